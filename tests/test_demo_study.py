"""The demo study end to end: the command line, recovery of the simulated effect (a simulation
with a known truth), and the number of rows that reach Python."""

from __future__ import annotations

import json
import tomllib

import pytest

from sqlmatch import api
from sqlmatch.cli import main
from sqlmatch.demo_run import build_demo, run_demo
from sqlmatch.spec import parse_spec


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo_cli")
    code = main(["demo", "--out", str(out), "--riders", "20000", "--quiet"])
    assert code == 0
    return out, json.loads((out / "results.json").read_text())


def test_demo_writes_the_promised_files(demo_run):
    out, results = demo_run
    assert (out / "report.md").read_text().startswith("# sqlmatch study `annual_pass`")
    assert (out / "sql" / "manifest.json").exists()
    assert {"effects", "balance", "matching", "rows_fetched", "demo_truth"} <= set(results)
    for effect in results["effects"]:
        assert {"outcome", "estimate", "std_error", "ci_low", "ci_high", "n_treated", "n_control"} <= set(effect)
    for row in results["balance"]:
        assert {"covariate", "smd_before", "smd_after", "variance_ratio_before", "variance_ratio_after"} <= set(row)
    assert {"method", "n_treated", "n_treated_matched", "n_control", "n_control_matched", "strata_dropped"} <= set(results["matching"])


def test_demo_interval_covers_the_simulated_truth(demo_run):
    """The demo as a user runs it: the 95% interval for trips covers the effect the simulation put in."""
    _, results = demo_run
    truth = results["demo_truth"]["post_trips"]
    effect = next(e for e in results["effects"] if e["outcome"] == "post_trips")
    assert effect["ci_low"] <= truth <= effect["ci_high"], (effect, truth)


def test_intervals_cover_the_truth_across_simulations(tmp_path):
    """A simulation with a known truth: 8 seeds x 4 outcomes, each a 95% interval; with honest
    intervals about 30 of 32 cover. We require at least 85% (a wide tolerance: 8 draws are few, and
    the four outcomes of one seed are correlated). The full calibration run lives in benchmarks/."""
    covered, total = 0, 0
    for seed in range(1, 9):
        results, _ = run_demo(tmp_path / str(seed), riders=12_000, seed=seed)
        for effect in results.effects:
            truth = results.demo_truth[effect.outcome]
            covered += effect.ci_low <= truth <= effect.ci_high
            total += 1
    assert covered / total >= 0.85, f"{covered}/{total} intervals covered the truth"


def test_naive_difference_misses_the_truth(demo_run):
    """Heavier riders buy the pass, so the unmatched difference overstates the effect on trips."""
    _, results = demo_run
    truth = results["demo_truth"]["post_trips"]
    effect = next(e for e in results["effects"] if e["outcome"] == "post_trips")
    assert not effect["naive"]["ci_low"] <= truth <= effect["naive"]["ci_high"]
    assert effect["naive"]["estimate"] > truth


def test_matching_balances_the_features(demo_run):
    """|SMD| < 0.1 after matching on the matched features (0.1: common practice, Austin 2009)."""
    _, results = demo_run
    after = {b["covariate"]: b["smd_after"] for b in results["balance"]}
    assert abs(after["pre_trips"]) < 0.1
    assert all(abs(v) < 0.1 for k, v in after.items() if k.startswith("age_band="))


def test_rows_fetched_does_not_grow_with_the_data(tmp_path):
    """Ten times the riders (and trips): the same number of rows reaches Python. The rows are per
    group, stratum and level, so the spec bounds them; coarse cut points make every cell populated
    at both sizes, so the counts must be equal, not merely bounded."""
    fetched = []
    for riders in (3_000, 30_000):
        folder = tmp_path / str(riders)
        spec_path = build_demo(folder, riders=riders, seed=7)
        raw = tomllib.loads(spec_path.read_text())
        raw["matching"]["cut_points"]["pre_trips"] = [1, 2, 4, 8, 16]
        spec = parse_spec(raw, source_path=spec_path)
        results = api.run(spec)
        assert results.matching.strata == 6 * 4  # every cell matched at both sizes
        fetched.append(results.rows_fetched)
    assert fetched[0] == fetched[1]
    # per step: 2 group sizes, 2 balance rows, 2 x 10 categorical levels, 1 L1 row, 5 features x
    # HISTOGRAM_BINS bins x 2 groups of histograms, 2 x 24 strata, 2 unmatched groups, and a handful of
    # one-row summaries
    from sqlmatch.plan import HISTOGRAM_BINS

    assert fetched[0] < 2 + 2 + 20 + 1 + 5 * HISTOGRAM_BINS * 2 + 48 + 2 + 10


def test_progress_lines_name_each_step_with_time_and_rows(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "p"), "--riders", "2000"]) == 0
    err = capsys.readouterr().err
    lines = [line for line in err.splitlines() if line.startswith("sqlmatch: [")]
    assert any("unit_measures" in line and "rows written" in line for line in lines)
    assert any("outcome_strata" in line and "rows fetched" in line for line in lines)
    assert all(line.split("]")[1].split()[1].endswith("s") for line in lines)  # elapsed seconds on every line
    assert main(["demo", "--out", str(tmp_path / "q"), "--riders", "2000", "--quiet"]) == 0
    assert "sqlmatch: [" not in capsys.readouterr().err
