"""NULL attributes: every numeric attribute needs an explicit policy for missing values (refuse,
fill plus an indicator feature, or drop the unit); each policy is checked against counts made
independently in pandas from the units table, and what it did is reported in plain words."""

from __future__ import annotations

import shutil
import tomllib

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.cli import main
from sqlmatch.errors import DataError, SpecError
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from test_spec_errors import write_spec

STUDY_START = "2026-03-01"


@pytest.fixture
def db(demo_dir, tmp_path):
    """The demo warehouse with a numeric attribute, commute_km, NULL for about one rider in seven."""
    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    with duckdb.connect(str(path)) as con:
        con.execute("ALTER TABLE riders ADD COLUMN commute_km DOUBLE")
        con.execute("UPDATE riders SET commute_km = CASE WHEN hash(rider_id) % 7 = 0 THEN NULL ELSE (hash(rider_id) % 150) / 10.0 END")
    return path


def raw_spec(db, **feature) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    raw["features"].append({"name": "commute_km", "aggregate": "attribute", "attribute": "commute_km", **feature})
    return raw


def study_tables(db) -> list[str]:
    with duckdb.connect(str(db), read_only=True) as con:
        return [t for (t,) in con.execute("SELECT table_name FROM information_schema.tables WHERE table_schema = 'sqlmatch'").fetchall()]


def nulls_by_group(db) -> dict[int, int]:
    """The reference count, made in pandas from the rows of the study's units (cohort 2026-03,
    controls never enrolled or enrolled after the post window, as the demo spec says)."""
    with duckdb.connect(str(db), read_only=True) as con:
        riders = con.execute("SELECT pass_bought_on, commute_km FROM riders").df()
    bought = riders.pass_bought_on.astype("datetime64[ns]")
    treated = (bought >= "2026-03-01") & (bought < "2026-04-01")
    control = bought.isna() | (bought >= "2026-07-01")
    missing = riders.commute_km.isna()
    return {1: int((treated & missing).sum()), 0: int((control & missing).sum()), "n1": int(treated.sum()), "n0": int(control.sum())}


def test_numeric_nulls_without_a_policy_are_refused(db, tmp_path, capsys):
    spec_path = write_spec(tmp_path, raw_spec(db), db)
    code = main(["run", str(spec_path), "--out", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    expected = nulls_by_group(db)
    assert code != 0 and "Traceback" not in err
    assert "features[7] (commute_km).missing" in err
    assert f"{expected[1] + expected[0]:,} units in the study ({expected[1]:,} treated, {expected[0]:,} control)" in err
    assert 'missing = "fill"' in err and 'missing = "drop"' in err
    assert study_tables(db) == []


def test_fill_adds_an_indicator_that_is_matched_and_reported(db):
    raw = raw_spec(db, missing="fill", fill=0.0)
    raw["matching"]["on"] = ["pre_trips", "age_band", "commute_km"]
    raw["matching"]["cut_points"]["commute_km"] = [2.5, 5.0, 10.0]
    spec = parse_spec(raw)
    assert spec.matching.on == ("pre_trips", "age_band", "commute_km", "commute_km_missing")
    assert spec.matching.cut_points["commute_km_missing"] == (0.5,)
    results = api.run(spec, keep_tables=True)
    expected = nulls_by_group(db)
    rows = {b.covariate: b for b in results.balance}
    indicator = rows["commute_km_missing"]
    # Before matching the indicator's mean is each group's share of NULLs (pandas counts above).
    assert indicator.mean_treated_before == pytest.approx(expected[1] / expected["n1"], rel=1e-12)
    assert indicator.mean_control_before == pytest.approx(expected[0] / expected["n0"], rel=1e-12)
    # Matched exactly on the indicator (cut point 0.5): after matching both groups share it.
    assert indicator.mean_treated_after == pytest.approx(indicator.mean_control_after, abs=1e-12)
    with duckdb.connect(str(db), read_only=True) as con:
        filled = con.execute(
            "SELECT COUNT(*) FROM sqlmatch.annual_pass_measures WHERE commute_km_missing = 1 AND commute_km = 0"
        ).fetchone()[0]
        null_left = con.execute("SELECT COUNT(*) FROM sqlmatch.annual_pass_measures WHERE commute_km IS NULL").fetchone()[0]
    assert filled == expected[1] + expected[0] and null_left == 0
    text = " ".join(results.warnings)
    assert f"{expected[1] + expected[0]:,} units ({expected[1]:,} treated, {expected[0]:,} control) have no value for 'commute_km': filled with 0" in text


def test_drop_takes_units_out_and_says_how_many(db):
    results = api.run(parse_spec(raw_spec(db, missing="drop")), keep_tables=False)
    expected = nulls_by_group(db)
    assert results.matching.n_treated == expected["n1"] - expected[1]
    assert results.matching.n_control == expected["n0"] - expected[0]
    assert any("have no value for 'commute_km': they were left out of the study" in w for w in results.warnings)


def test_dropping_every_treated_unit_is_refused(db):
    with duckdb.connect(str(db)) as con:
        con.execute("UPDATE riders SET commute_km = NULL WHERE pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01'")
    with pytest.raises(DataError) as info:
        api.run(parse_spec(raw_spec(db, missing="drop")))
    assert "'treatment.cohort'" in str(info.value) and "every treated unit has a NULL in commute_km" in str(info.value)
    assert study_tables(db) == []


def test_small_null_counts_are_not_printed(db):
    with duckdb.connect(str(db)) as con:
        con.execute("UPDATE riders SET commute_km = COALESCE(commute_km, 1.0)")
        con.execute("UPDATE riders SET commute_km = NULL WHERE rider_id IN (SELECT rider_id FROM riders WHERE pass_bought_on IS NULL ORDER BY rider_id LIMIT 3)")
    results = api.run(parse_spec(raw_spec(db, missing="fill", fill=0.0)), keep_tables=False)
    (line,) = [w for w in results.warnings if "commute_km" in w and "no value" in w]
    assert "fewer than 10 units (0 treated, fewer than 10 control)" in line and " 3 " not in line


@pytest.mark.parametrize(
    "feature, key, words",
    [
        ({"name": "x", "aggregate": "count", "missing": "drop"}, "features[7] (x).missing", "only applies to attribute features"),
        ({"name": "x", "aggregate": "attribute", "attribute": "commute_km", "missing": "fill"}, "features[7] (x).fill", 'is needed with missing = "fill"'),
        ({"name": "x", "aggregate": "attribute", "attribute": "commute_km", "missing": "drop", "fill": 1}, "features[7] (x).fill", 'only used with missing = "fill"'),
        ({"name": "x", "aggregate": "attribute", "attribute": "commute_km", "type": "categorical", "missing": "fill"}, "features[7] (x).missing", "must be one of level, drop"),
        ({"name": "x", "aggregate": "attribute", "attribute": "commute_km", "missing": "guess"}, "features[7] (x).missing", "must be one of error, fill, drop"),
        ({"name": "pre_trips_missing", "aggregate": "count"}, "features", "has the name of another feature"),
    ],
)
def test_bad_missing_policies_name_the_key(db, feature, key, words):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    if feature["name"] == "pre_trips_missing":
        raw["features"].append({"name": "commute_km", "aggregate": "attribute", "attribute": "commute_km", "missing": "fill", "fill": 0})
        raw["features"].append({"name": "commute_km_missing", "aggregate": "count"})
    else:
        raw["features"].append(feature)
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert key in str(info.value) and words in str(info.value)
