"""matching.min_treated: a run that matches fewer treated units than the minimum is refused with one
line naming the counts, the key and how to fix it, exits 2 without a traceback and leaves no study
table behind; the same study passes once the minimum is at or below what it keeps."""

from __future__ import annotations

import re
import shutil
import tomllib

import duckdb
import pytest

from sqlmatch import api
from sqlmatch.cli import main
from sqlmatch.errors import DataError, SpecError
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC
from test_spec_errors import study_tables, write_spec

# A small study: one district and one age band of the demo (a few dozen enrolees), coarsened with cut
# points one trip / day apart, so most enrolees find no control in their cell.
SMALL_FILTER = "home_district = 'Harbour' AND age_band = '25-34'"
FINE_CUTS = {
    "pre_trips": list(range(1, 60)),
    "pre_active_days": list(range(1, 100)),
    "pre_days_since_last": list(range(1, 190)),
}


def fine_study(min_treated: int | None = None) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["eligibility"]["filters"] = raw["eligibility"]["filters"] + [SMALL_FILTER]
    raw["matching"] = {"method": "coarsened_exact", "on": [*FINE_CUTS, "age_band"], "cut_points": FINE_CUTS}
    if min_treated is not None:
        raw["matching"]["min_treated"] = min_treated
    return raw


@pytest.fixture
def database(demo_dir, tmp_path):
    path = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", path)
    return path


def cohort_size(database) -> int:
    """The treated units of the small study, counted straight from the riders table (not by sqlmatch)."""
    with duckdb.connect(str(database), read_only=True) as con:
        return con.execute(
            "SELECT COUNT(*) FROM riders WHERE pass_bought_on >= DATE '2026-03-01' AND pass_bought_on < DATE '2026-04-01' "
            f"AND signup_date < DATE '2025-09-01' AND {SMALL_FILTER}"
        ).fetchone()[0]


def run_cli(spec_path, out, capsys) -> tuple[int, list[str], str]:
    code = main(["run", str(spec_path), "--out", str(out), "--quiet"])
    err = capsys.readouterr().err
    return code, [line for line in err.splitlines() if line.strip()], err


def test_too_few_matched_treated_units_is_refused_then_passes_at_a_lower_minimum(database, tmp_path, capsys):
    n_cohort = cohort_size(database)
    assert n_cohort >= 20  # a cohort that could support an effect, before the fine cut points

    # default minimum (10): refused, one line, exit 2, no traceback, nothing left behind
    spec_path = write_spec(tmp_path, fine_study(), database)
    assert parse_spec(tomllib.loads(spec_path.read_text())).matching.min_treated == 10
    code, lines, err = run_cli(spec_path, tmp_path / "out", capsys)
    assert code == 2
    assert len(lines) == 1 and lines[0].startswith("sqlmatch: error:"), err
    assert "Traceback" not in err
    message = lines[0]
    found = re.search(r"only (\d+) of the (\d+) treated units in the cohort were matched", message)
    assert found, message
    kept, in_cohort = int(found.group(1)), int(found.group(2))
    assert in_cohort == n_cohort
    assert 1 <= kept < 10, message  # the premise: some matched, fewer than the default minimum
    assert "matching.min_treated = 10" in message and "'matching.min_treated'" in message
    assert "Fix:" in message and "coarser cut points" in message and "lower matching.min_treated" in message
    assert study_tables(database) == []
    assert not (tmp_path / "out" / "results.json").exists()

    # one above what the study keeps: still refused
    spec_path = write_spec(tmp_path, fine_study(min_treated=kept + 1), database)
    code, lines, err = run_cli(spec_path, tmp_path / "out", capsys)
    assert code == 2 and len(lines) == 1 and f"only {kept} of the {n_cohort}" in lines[0], err
    assert study_tables(database) == []

    # exactly what it keeps: the same study runs, and reports the counts the error named
    spec_path = write_spec(tmp_path, fine_study(min_treated=kept), database)
    code, lines, err = run_cli(spec_path, tmp_path / "out", capsys)
    assert code == 0, err
    assert (tmp_path / "out" / "results.json").exists()
    assert study_tables(database) == []  # the command line drops the work tables after a run

    raw = fine_study(min_treated=kept)
    raw["study"]["database"] = str(database)
    results = api.run(parse_spec(raw), keep_tables=False)
    assert results.matching.n_treated_matched == kept
    assert results.matching.n_treated == n_cohort


def test_api_raises_a_data_error_naming_the_key(database):
    raw = fine_study()
    raw["study"]["database"] = str(database)
    with pytest.raises(DataError) as info:
        api.run(parse_spec(raw))
    assert "(spec key 'matching.min_treated')" in str(info.value)
    assert "\n" not in str(info.value)
    assert study_tables(database) == []


@pytest.mark.parametrize("value", [0, -3, 2.5, "ten", True, [10]])
def test_bad_min_treated_is_refused_naming_the_key(value):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["matching"]["min_treated"] = value
    with pytest.raises(SpecError) as info:
        parse_spec(raw)
    assert info.value.key == "matching.min_treated"
    text = str(info.value)
    assert text.startswith("spec key 'matching.min_treated': must be a whole number") and "Fix: write e.g. min_treated = 10" in text
    assert "\n" not in text


def test_bad_min_treated_on_the_command_line(database, tmp_path, capsys):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["matching"]["min_treated"] = 0
    spec_path = write_spec(tmp_path, raw, database)
    code, lines, err = run_cli(spec_path, tmp_path / "out", capsys)
    assert code == 2
    assert len(lines) == 1 and "'matching.min_treated'" in lines[0] and "Fix:" in lines[0], err
    assert "Traceback" not in err
    assert study_tables(database) == []



def test_few_treated_kept_says_the_effect_is_for_them_only(demo_db):
    """Fine cut points keep part of the cohort: the warning says the effect is for the kept units,
    with their feature means (the balance table's treated-after means) beside the cohort's."""
    import tomllib

    from sqlmatch import api
    from sqlmatch.spec import parse_spec

    from conftest import DEMO_SPEC

    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(demo_db)
    baseline = api.run(parse_spec(raw))
    assert not any("were matched: every effect" in w for w in baseline.warnings)  # the demo keeps all 1,458
    numeric = [f["name"] for f in raw["features"] if f.get("type") != "categorical" and "twin" not in f]
    raw["matching"]["on"] = [f["name"] for f in raw["features"]]
    raw["matching"]["cut_points"] = {k: [float(x) for x in range(1, 400, 3)] for k in numeric}
    results = api.run(parse_spec(raw))
    m = results.matching
    assert m.n_treated_matched < 0.9 * m.n_treated
    # with each group's own slopes and squares, cells this fine leave the within-stratum regressions
    # extrapolating: the adjusted effect's SE is many times the plain one's, so the plain comparison
    # stays the headline (effects.EXTRAPOLATION_RATIO)
    group = api.run(parse_spec({**raw, "effect": {"adjustment_slopes": "group", "adjustment_terms": "squares"}}))
    e = group.effect("post_trips")
    assert e.adjusted.std_error > 3 * e.std_error and e.unadjusted is None and "not the headline" in e.estimator
    (text,) = [w for w in results.warnings if "were matched: every effect" in w]
    assert text.kind == "kept"  # what `--fail-on kept` acts on
    assert f"Only {m.n_treated_matched:,} of the {m.n_treated:,} enrolled units ({m.n_treated_matched / m.n_treated:.0%})" in text
    rows = {b.covariate: b for b in results.balance}
    named = [part.split(" ")[0] for part in text.split("their means: ")[1].split("; ")]
    for name in named:
        assert f"{name} {rows[name].mean_treated_after:.3g} (cohort {rows[name].mean_treated_before:.3g})" in text
