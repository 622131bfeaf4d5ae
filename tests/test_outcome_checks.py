"""Outcomes that cannot be computed as asked: a ratio whose numerator is NULL on some events, a
denominator that sums to zero, a post window the events do not reach, NaN in a measure. Each
gives a result defined in the docs with a warning, or a clear error naming the spec key and the
fix, and leaves no work table behind."""

from __future__ import annotations

import shutil
import tomllib

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.errors import DataError
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC

POST = "started_at >= TIMESTAMP '2026-04-01' AND started_at < TIMESTAMP '2026-07-01'"


@pytest.fixture
def db(demo_dir, tmp_path):
    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    return path


def spec_for(db, edit=None):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(db)
    if edit:
        edit(raw)
    return parse_spec(raw)


def work_tables(db):
    with duckdb.connect(str(db), read_only=True) as con:
        return con.execute("SELECT table_name FROM information_schema.tables WHERE table_schema = 'sqlmatch'").fetchall()


def test_a_ratio_uses_only_events_with_a_value_in_both_parts(db):
    """fare_per_trip = sum(fare) / number of trips: trips without a fare count in neither part.
    Reference: the naive (before matching) ratio difference recomputed in plain SQL over the
    study's units, SUM(fare) / COUNT(fare) per group."""
    first = api.run(spec_for(db), keep_tables=True)
    with duckdb.connect(str(db)) as con:
        con.execute("CREATE TABLE study_units AS SELECT unit_key, treated FROM sqlmatch.annual_pass_units")
        con.execute("DROP SCHEMA sqlmatch CASCADE")
        con.execute(f"UPDATE trips SET fare = NULL WHERE {POST} AND trip_id % 4 = 0")
        rows = dict(
            (t, (y, x, missing))
            for t, y, x, missing in con.execute(
                "SELECT s.treated, SUM(t.fare), COUNT(t.fare), COUNT(*) - COUNT(t.fare) FROM trips AS t "
                f"JOIN study_units AS s ON s.unit_key = t.rider_id WHERE {POST.replace('started_at', 't.started_at')} GROUP BY 1"
            ).fetchall()
        )
    want = rows[1][0] / rows[1][1] - rows[0][0] / rows[0][1]
    results = api.run(spec_for(db), keep_tables=False)
    (effect,) = [e for e in results.effects if e.outcome == "fare_per_trip"]
    assert effect.naive.estimate == pytest.approx(want, rel=1e-9)
    assert first.effects != results.effects
    missing = rows[1][2] + rows[0][2]
    (line,) = [w for w in results.warnings if "fare_per_trip" in w and "no value" in w]
    assert "outcomes[2] (fare_per_trip)" in line and f"{missing:,} events" in line and "'fare'" in line


def test_a_denominator_that_sums_to_zero_is_refused_naming_the_outcome(db):
    with duckdb.connect(str(db)) as con:
        con.execute("ALTER TABLE trips ADD COLUMN refunds DOUBLE DEFAULT 0")

    def edit(raw):
        raw["outcomes"].append({"name": "fare_per_refund", "aggregate": "ratio", "numerator": "fare", "denominator": "refunds"})

    with pytest.raises(DataError) as info:
        api.run(spec_for(db, edit), keep_tables=True)
    text = str(info.value)
    assert "outcomes[4] (fare_per_refund).denominator" in text and "'refunds'" in text and "Fix:" in text and "\n" not in text
    assert work_tables(db) == []


def test_a_post_window_past_the_data_is_refused_naming_the_windows(db):
    with duckdb.connect(str(db)) as con:
        con.execute("DELETE FROM trips WHERE started_at >= TIMESTAMP '2026-04-01'")
    with pytest.raises(DataError) as info:
        api.run(spec_for(db), keep_tables=True)
    text = str(info.value)
    assert "windows.post" in text and "2026-04-01" in text and "2026-03-31" in text and "treatment.cohort" in text
    assert work_tables(db) == []


@pytest.mark.parametrize(
    "where, key",
    [
        ("started_at < TIMESTAMP '2026-03-01'", "features[1] (pre_minutes).measure"),  # pre window only: a feature
        (POST, "outcomes[1] (post_minutes).measure"),  # post window only: an outcome
    ],
)
def test_nan_in_a_measure_is_refused_naming_the_feature_or_outcome(db, where, key):
    with duckdb.connect(str(db)) as con:
        (n,) = con.execute(f"SELECT COUNT(*) FROM trips WHERE {where} AND started_at >= TIMESTAMP '2025-09-01'").fetchone()
        assert n > 0
        # one trip in 50 of that window (some of them the study's units')
        con.execute(f"UPDATE trips SET minutes = CAST('NaN' AS DOUBLE) WHERE {where} AND started_at >= TIMESTAMP '2025-09-01' AND trip_id % 50 = 0")
    with pytest.raises(DataError) as info:
        api.run(spec_for(db), keep_tables=True)
    text = str(info.value)
    assert key in text and "'minutes'" in text and "NaN" in text and "Fix:" in text
    assert work_tables(db) == []


def test_nan_from_a_feature_expression_names_the_expression(db):
    """An expression over unit columns can make NaN or infinity from finite values (here a
    division by a column that is 0 for some riders: DuckDB gives infinity, Spark NULL, PostgreSQL
    an error; DuckDB's case is the one that must not pass silently)."""
    with duckdb.connect(str(db)) as con:
        con.execute("ALTER TABLE riders ADD COLUMN zero_or_one DOUBLE")
        con.execute("UPDATE riders SET zero_or_one = CASE WHEN rider_id % 7 = 0 THEN 0 ELSE 1 END")

    def edit(raw):
        raw["features"].append({"name": "inverse", "aggregate": "attribute", "expression": "1.0 / zero_or_one"})

    with pytest.raises(DataError) as info:
        api.run(spec_for(db, edit), keep_tables=True)
    text = str(info.value)
    assert "features[7] (inverse).expression" in text and "'1.0 / zero_or_one'" in text and "Fix:" in text
    assert work_tables(db) == []
