"""Pooling across cohorts against statsmodels' meta-analysis (combine_effects, fixed effect)."""

from __future__ import annotations

import numpy as np
import pytest
from statsmodels.stats.meta_analysis import combine_effects

from sqlmatch.estimators.pooling import pool


def test_fixed_effect_pool_equals_statsmodels():
    est = np.array([4.1, 4.9, 3.7, 5.6, 4.4])
    se = np.array([0.5, 0.4, 0.6, 0.7, 0.45])
    ours = pool(list(est), list(se))
    ref = combine_effects(est, se**2, method_re="chi2")
    frame = ref.summary_frame()
    assert ours.estimate == pytest.approx(frame.loc["fixed effect", "eff"], rel=1e-12)
    assert ours.std_error == pytest.approx(frame.loc["fixed effect", "sd_eff"], rel=1e-12)
    assert ours.ci_low == pytest.approx(frame.loc["fixed effect", "ci_low"], rel=1e-9)
    assert ours.q == pytest.approx(ref.q, rel=1e-12)  # Cochran's Q
    assert ours.i_squared == pytest.approx(ref.i2, rel=1e-9)  # Higgins & Thompson (2002) I^2


def test_identical_cohorts_have_no_heterogeneity():
    ours = pool([2.0, 2.0, 2.0], [1.0, 1.0, 1.0])
    assert ours.q == 0.0 and ours.i_squared == 0.0
    assert ours.std_error == pytest.approx(1 / np.sqrt(3))


def test_cohorts_run_each_month_and_pool(demo_dir, tmp_path, capsys):
    import json
    import shutil

    from sqlmatch.cli import main

    from conftest import DEMO_SPEC

    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    shutil.copyfile(DEMO_SPEC, tmp_path / "annual_pass.toml")
    code = main(["run", str(tmp_path / "annual_pass.toml"), "--out", str(tmp_path / "out"), "--cohorts", "2026-02:2026-04", "--quiet"])
    assert code == 0
    body = json.loads((tmp_path / "out" / "results.json").read_text())
    assert [c["cohort"] for c in body["cohorts"]] == ["2026-02", "2026-03", "2026-04"]
    trips = next(p for p in body["pooled"] if p["outcome"] == "post_trips")
    est = [next(e for e in c["effects"] if e["outcome"] == "post_trips") for c in body["cohorts"]]
    # fixed weights: each month's count of matched enrolled units (the ATT over every month's enrolled)
    n = np.array([e["n_treated"] for e in est], dtype=float)
    # of the stratified effects: the months' headlines are regression-adjusted (the default), their per-unit terms are not
    plain = [(e.get("unadjusted") or e)["estimate"] for e in est]
    assert all(e.get("unadjusted") for e in est) and "unadjusted" in trips["note"]
    assert trips["estimate"] == pytest.approx(float(n @ np.array(plain) / n.sum()), rel=1e-12)
    assert trips["weights"] == pytest.approx(list(n / n.sum()), rel=1e-12)
    # never-enrolled controls serve in every month: the months' effects covary positively here
    assert trips["std_error"] > trips["std_error_if_independent"]
    assert "pooled effect" in (tmp_path / "out" / "report.md").read_text()
    assert (tmp_path / "out" / "report-2026-03.html").read_text().startswith("<!DOCTYPE html>")
    assert main(["run", str(tmp_path / "annual_pass.toml"), "--out", str(tmp_path / "x"), "--cohorts", "2026-05:2026-01"]) == 2
    assert "--cohorts: '2026-05:2026-01' ends before it starts" in capsys.readouterr().err


def test_cohorts_with_nearest_neighbours_give_no_pooled_interval_and_say_why(demo_dir, tmp_path, capsys):
    """Nearest neighbours: the months' covariances are not computed for their variance, so the
    pooled estimate comes without an interval (and the reason is printed and written)."""
    import json
    import shutil

    from sqlmatch.cli import main

    from conftest import DEMO_SPEC

    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    shutil.copyfile(DEMO_SPEC, tmp_path / "annual_pass.toml")
    code = main(["run", str(tmp_path / "annual_pass.toml"), "--out", str(tmp_path / "out"), "--cohorts", "2026-02:2026-03", "--method", "nearest_neighbour", "--quiet"])
    assert code == 0
    body = json.loads((tmp_path / "out" / "results.json").read_text())
    trips = next(p for p in body["pooled"] if p["outcome"] == "post_trips")
    assert trips["std_error"] is None and trips["ci_low"] is None and "covary" in trips["note"]
    est = [next(e for e in c["effects"] if e["outcome"] == "post_trips") for c in body["cohorts"]]
    n = np.array([e["n_treated"] for e in est], dtype=float)
    assert trips["estimate"] == pytest.approx(float(n @ np.array([e["estimate"] for e in est]) / n.sum()), rel=1e-12)
    assert "no pooled interval for matching.method = 'nearest_neighbour'" in capsys.readouterr().err
    assert "no pooled interval" in (tmp_path / "out" / "report.md").read_text()


def test_cleanup_drops_the_influence_tables_a_killed_cohorts_run_left(demo_dir, tmp_path):
    import shutil

    import duckdb

    from sqlmatch import api

    from conftest import DEMO_SPEC

    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    shutil.copyfile(DEMO_SPEC, tmp_path / "annual_pass.toml")
    spec = api.load(tmp_path / "annual_pass.toml")
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        con.execute("CREATE SCHEMA IF NOT EXISTS sqlmatch")
        for name in ("annual_pass_influence_2026_03", "annual_pass_influence_2026_04__building", "annual_pass_influence_notes"):
            con.execute(f"CREATE TABLE sqlmatch.{name} AS SELECT 1 AS x")
    dropped = api.cleanup(spec)
    assert "sqlmatch.annual_pass_influence_2026_03" in dropped and "sqlmatch.annual_pass_influence_2026_04__building" in dropped
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        left = [t for (t,) in con.execute("SELECT table_name FROM information_schema.tables WHERE table_schema = 'sqlmatch'").fetchall()]
    assert left == ["annual_pass_influence_notes"]  # not a name sqlmatch writes: left alone
