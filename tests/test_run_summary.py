"""The end of a run on stderr: one headline per outcome and every warning with its kind, and
`--fail-on` turning chosen kinds into exit status 1 for schedulers."""

from __future__ import annotations

import html
import json
import shutil

import duckdb
import numpy as np
import pytest

from sqlmatch.cli import main

from conftest import DEMO_SPEC


def _study(demo_dir, tmp_path, matching: str | None = None):
    """A copy of the demo warehouse and its spec (optionally with another [matching] block)."""
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    text = DEMO_SPEC.read_text()
    if matching is not None:
        text = text[: text.index("[matching]")] + matching
    spec = tmp_path / "annual_pass.toml"
    spec.write_text(text)
    return spec


def test_warnings_and_headlines_reach_stderr_and_fail_on_sets_the_exit_status(demo_dir, tmp_path, capsys):
    spec = _study(demo_dir, tmp_path)
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        con.execute("DELETE FROM trips WHERE started_at >= TIMESTAMP '2026-06-10'")  # post window runs past the data
    assert main(["run", str(spec), "--out", str(tmp_path / "a"), "--quiet"]) == 0
    err = capsys.readouterr().err
    results = json.loads((tmp_path / "a" / "results.json").read_text())
    post_trips = next(e for e in results["effects"] if e["outcome"] == "post_trips")
    # the headline carries the effect and interval of results.json
    assert f"sqlmatch: result: post_trips: +{post_trips['estimate']:.2f} per enrolled unit, 95% interval [{post_trips['ci_low']:.2f}, {post_trips['ci_high']:.2f}]" in err
    assert "sqlmatch: warning [coverage]: The events end on 2026-06-09" in err
    i = results["warning_kinds"].index("coverage")
    assert "events end on 2026-06-09" in results["warnings"][i]

    assert main(["run", str(spec), "--out", str(tmp_path / "b"), "--quiet", "--fail-on", "coverage"]) == 1
    err = capsys.readouterr().err
    assert "failing (--fail-on coverage): 1 coverage warning(s)" in err
    assert (tmp_path / "b" / "report.html").exists()  # written before the failing exit
    # a kind the run did not raise leaves the status 0
    assert main(["run", str(spec), "--out", str(tmp_path / "c"), "--quiet", "--fail-on", "model,features"]) == 0


def test_an_unknown_fail_on_kind_is_refused_before_any_work(demo_dir, tmp_path, capsys):
    spec = _study(demo_dir, tmp_path)
    with pytest.raises(SystemExit) as info:
        main(["run", str(spec), "--out", str(tmp_path / "a"), "--fail-on", "coverage,balanse"])
    assert info.value.code == 2
    assert "unknown warning kind(s) balanse" in capsys.readouterr().err
    assert not (tmp_path / "a").exists()


def test_imbalance_after_matching_is_a_balance_warning(demo_dir, tmp_path, capsys):
    # Matching on two coarse bins of pre_trips leaves the matched groups apart on pre_trips itself.
    spec = _study(demo_dir, tmp_path, '[matching]\nmethod = "coarsened_exact"\non = ["pre_trips"]\n\n[matching.cut_points]\npre_trips = [1]\n')
    assert main(["run", str(spec), "--out", str(tmp_path / "a"), "--quiet", "--keep", "--fail-on", "balance"]) == 1
    err = capsys.readouterr().err
    (line,) = [x for x in err.splitlines() if x.startswith("sqlmatch: warning [balance]:")]
    assert "Balance not achieved" in line
    # Independent check of the rule on pre_trips: the SMD after matching of Austin (2009, Stat Med
    # 28:3083) and Stuart (2010): means weighted by the matching weights, over the pooled SD of the
    # groups before matching (numpy.var with ddof=1 on every unit of the study).
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        units = con.execute("SELECT treated, pre_trips, match__weight FROM sqlmatch.annual_pass_weighted_units").fetchall()
    t = np.array([(x, w or 0.0) for g, x, w in units if g == 1], dtype=float)
    c = np.array([(x, w or 0.0) for g, x, w in units if g == 0], dtype=float)
    mt, mc = np.average(t[:, 0], weights=t[:, 1]), np.average(c[:, 0], weights=c[:, 1])
    vt, vc = np.var(t[:, 0], ddof=1), np.var(c[:, 0], ddof=1)
    smd = (mt - mc) / np.sqrt((vt + vc) / 2)
    assert abs(smd) > 0.1
    assert f"pre_trips {smd:+.3f}" in line
    main(["cleanup", str(spec)])


def test_a_multi_cohort_run_names_each_cohort_and_the_pooled_effect(demo_dir, tmp_path, capsys):
    spec = _study(demo_dir, tmp_path)
    assert main(["run", str(spec), "--out", str(tmp_path / "a"), "--quiet", "--cohorts", "2026-02:2026-03"]) == 0
    err = capsys.readouterr().err
    body = json.loads((tmp_path / "a" / "results.json").read_text())
    pooled = next(p for p in body["pooled"] if p["outcome"] == "active_last_month")
    # a binary outcome's pooled risk difference in percentage points, as each cohort's line gives it
    assert (
        f"sqlmatch: result: pooled over 2 cohorts: active_last_month: +{100 * pooled['estimate']:.1f} percentage points, "
        f"95% interval [{100 * pooled['ci_low']:.1f}, {100 * pooled['ci_high']:.1f}]"
    ) in err
    for month in ("2026-02", "2026-03"):
        assert f"sqlmatch: result: cohort {month}: post_trips: " in err


@pytest.mark.parametrize("command", ["run", "demo", "report"])
def test_the_help_of_each_command_with_fail_on_prints(command, capsys):
    with pytest.raises(SystemExit) as info:
        main([command, "--help"])
    assert info.value.code == 0
    out = capsys.readouterr().out
    assert "--fail-on KINDS" in out and "90%" in out  # the kept kind's threshold, as written


def test_a_placebo_effect_where_there_can_be_none_is_a_placebo_warning(demo_dir, tmp_path, capsys):
    # The demo design at pre=3/post=2 placed 3 months earlier; its windows all end before the cohort enrolled.
    spec = _study(demo_dir, tmp_path)
    spec.write_text(spec.read_text().replace("pre = 6\npost = 3", "pre = 3\npost = 2") + "\n[placebo]\nmonths_before = 3\n")
    code = main(["run", str(spec), "--out", str(tmp_path / "a"), "--quiet", "--fail-on", "placebo"])
    err = capsys.readouterr().err
    body = json.loads((tmp_path / "a" / "results.json").read_text())["placebo"]
    missed = [e["outcome"] for e in body["effects"] if not e["ci_low"] <= 0.0 <= e["ci_high"]]
    flagged = [line.split(": ")[2] for line in err.splitlines() if line.startswith("sqlmatch: warning [placebo]:")]
    assert [f.split(":")[0] for f in flagged] == missed
    assert missed and code == 1  # this design does miss (README: the placebo finds trips where there are none)
    page = (tmp_path / "a" / "report.html").read_text()
    assert "<h2>Placebo check</h2>" in page
    for reading in body["readings"]:
        assert html.escape(reading) in page
