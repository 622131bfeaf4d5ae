"""The reports a reader acts on: the HTML holds every figure the Markdown holds, both state the
design (matched features, cut points, propensity model, caliper) and read each effect in plain
words; nearest-neighbour runs use their own words; the plots keep the groups apart, cut long
tails with a note, draw categorical features and never draw a withheld count."""

from __future__ import annotations

import io
import json
import re
import shutil
import tomllib

import duckdb
import numpy as np
import pytest

from sqlmatch import api
from sqlmatch.report import plots
from sqlmatch.report.html import render_html
from sqlmatch.report.markdown import render_markdown
from sqlmatch.report.words import effect_sentence, number
from sqlmatch.results import Effect, Interval

from conftest import DEMO_SPEC


@pytest.fixture(scope="module")
def runs(demo_dir, tmp_path_factory):
    """The demo study with its own method (coarsened_exact) and with nearest neighbours, each
    with results.json (the independent rendering), report.md and report.html."""
    out = {}
    for method in ("coarsened_exact", "nearest_neighbour"):
        folder = tmp_path_factory.mktemp(method)
        shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
        shutil.copyfile(DEMO_SPEC, folder / "annual_pass.toml")
        spec = api.load(folder / "annual_pass.toml").with_overrides(method=method)
        results = api.run(spec, keep_tables=True)
        api.write_results(results, folder / "out")
        out[method] = {
            "results": results,
            "json": json.loads((folder / "out" / "results.json").read_text()),
            "html": (folder / "out" / "report.html").read_text(),
            "md": (folder / "out" / "report.md").read_text(),
            "db": folder / "bikeshare.duckdb",
        }
    return out


def _pct(x):
    return f"{100 * x:+.1f}%"


def test_the_html_holds_every_figure_the_markdown_holds(runs):
    run = runs["coarsened_exact"]
    body, page, md = run["json"], run["html"], run["md"]
    wanted = []
    for e in body["effects"]:
        wanted += [f"{e['estimate']:,.3f}", f"[{e['ci_low']:,.3f}, {e['ci_high']:,.3f}]", _pct(e["lift"]["estimate"]),
                   f"[{_pct(e['lift']['ci_low'])}, {_pct(e['lift']['ci_high'])}]", f"{e['naive']['estimate']:,.3f}"]
        if e["risk_ratio"]:
            wanted += [f"{e['risk_ratio']['estimate']:,.2f}", f"[{e['risk_ratio']['ci_low']:,.2f}, {e['risk_ratio']['ci_high']:,.2f}]"]
        if e["did"]:
            wanted += [f"{e['did']['estimate']:,.3f}", f"[{e['did']['ci_low']:,.3f}, {e['did']['ci_high']:,.3f}]"]
        if e["unadjusted"]:
            # the headline is regression-adjusted by default: the plain comparison stays in both reports
            wanted += [f"{e['unadjusted']['estimate']:,.3f}", f"[{e['unadjusted']['ci_low']:,.3f}, {e['unadjusted']['ci_high']:,.3f}]"]
        s = e["sensitivity"]
        wanted += [f"{s['e_value']:,.2f}", f"{s['e_value_ci']:,.2f}", f"{100 * s['robustness_value']:.1f}%"]
    for b in body["balance"]:
        for key, digits in (("smd_before", 3), ("variance_ratio_before", 2), ("variance_ratio_after", 2)):
            if b[key] is not None:
                wanted.append(f"{b[key]:,.{digits}f}")
    assert body["effects"] and any(e["risk_ratio"] for e in body["effects"]) and any(e["did"] for e in body["effects"])
    assert any(e["unadjusted"] for e in body["effects"])
    for text in wanted:
        assert text in md, text
        assert text in page, text
    assert "difference-in-differences" in page and "risk ratio" in page and "E-value" in page


def test_both_reports_state_the_design(runs):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    cuts = ", ".join(f"{c:g}" for c in raw["matching"]["cut_points"]["pre_trips"])
    for key in ("html", "md"):
        text = runs["coarsened_exact"][key]
        assert f"cut points: {cuts}" in text  # the spec file's cut points, as given
        assert "Matched on age_band" in text and "exact levels" in text
        for f in raw["features"]:
            assert f["name"] in text.split("Design", 1)[1]
        assert "sqlmatch 0.1.0" in text and "plan fingerprint" in text
    nn = runs["nearest_neighbour"]
    # the caliper's width on the logit scale is 0.2 x the pooled SD of the logit score (Austin 2011),
    # recomputed with numpy from the scores the run kept
    with duckdb.connect(str(nn["db"]), read_only=True) as con:
        scores = np.array(con.execute("SELECT treated, score FROM sqlmatch.annual_pass_scores").fetchall(), dtype=float)
    t, c = scores[scores[:, 0] == 1, 1], scores[scores[:, 0] == 0, 1]
    width = 0.2 * np.sqrt((t.var(ddof=1) + c.var(ddof=1)) / 2)
    assert nn["json"]["design"]["caliper"]["width"] == pytest.approx(width, rel=1e-9)
    for key in ("html", "md"):
        assert f"0.2 SD of the logit propensity score (pooled over the groups) = {width:.4g} on the logit scale" in nn[key]
        assert "logistic regression of enrolment on pre_trips, age_band" in nn[key]
    coefficients = nn["json"]["design"]["propensity"]["coefficients"]
    assert [c["term"] for c in coefficients][:2] == ["intercept", "pre_trips"]


def test_each_effect_is_read_in_plain_words(runs):
    r = runs["coarsened_exact"]["results"]
    body = runs["coarsened_exact"]["json"]
    e = next(x for x in body["effects"] if x["outcome"] == "post_trips")
    sentence = effect_sentence(r, r.effect("post_trips"))
    assert f"had {number(e['estimate'])} more post_trips each over the 3 months from 2026-04-01" in sentence
    assert f"{number(e['mean_treated'])} against {number(e['mean_control'])}, {_pct(e['lift']['estimate'])}" in sentence
    for key in ("html", "md"):
        assert "What the result means" in runs["coarsened_exact"][key]
        assert "no unmeasured confounding" in runs["coarsened_exact"][key] and "no interference" in runs["coarsened_exact"][key]
    # a negative effect whose interval includes zero is said to be consistent with no change
    flat = Effect("post_trips", "continuous", "x", -0.4, 0.3, -0.99, 0.19, 100, 100, 4.6, 5.0, lift=Interval(-0.08))
    text = effect_sentence(r, flat)
    assert "0.40 less post_trips" in text and "consistent with no change" in text


def test_nearest_neighbour_reports_speak_of_matched_sets_and_controls_not_picked(runs):
    nn = runs["nearest_neighbour"]
    m = nn["json"]["matching"]
    not_picked = m["n_control"] - m["n_control_matched"] - m["n_control_outside_support"]
    assert not_picked > 0
    for key in ("html", "md"):
        text = nn[key]
        assert "Strata used" not in text and "no comparable unit" not in text
        assert "comparison units not picked as a match" in text and f"{not_picked:,}" in text
        assert f"the {m['n_control_matched']:,} distinct comparison units serve the {m['n_treated_matched']:,} matched enrolled units" in text
    assert "Strata used" in runs["coarsened_exact"]["md"]


def _svgs(page: str) -> dict[str, str]:
    return {m.group(1): m.group(0) for m in re.finditer(r'<svg[^>]*aria-label="([^"]*)".*?</svg>', page, re.S)}


def test_distributions_keep_the_groups_apart_with_legend_and_axis_label(runs):
    svgs = _svgs(runs["coarsened_exact"]["html"])
    numeric = [f["name"] for f in tomllib.loads(DEMO_SPEC.read_text())["features"] if f.get("type") != "categorical"]
    for name in numeric:
        svg = svgs[f"Distribution of {name} before and after matching"]
        assert svg.count(f'stroke="{plots.TREATED}" fill="none"') == 3  # the enrolled as an outline: two panels and the legend
        assert f'fill="{plots.CONTROL}" stroke="none" fill-opacity="0.3"' in svg  # the comparison as a light fill
        assert ">enrolled<" in svg and ">not enrolled (comparison)<" in svg and ">share of the group<" in svg
    for feature in ("age_band", "home_district"):
        assert f"Levels of {feature} before and after matching" in svgs  # categorical features are plotted
    # the who-was-compared legend names only the parts that occur (counts from results.json)
    m = runs["coarsened_exact"]["json"]["matching"]
    occurring = {
        "matched": m["n_treated_matched"] + m["n_control_matched"],
        "outside the common support": m["n_treated_outside_support"] + m["n_control_outside_support"],
        "no comparable unit in the stratum": m["n_treated_no_comparable"] + m["n_control_no_comparable"],
    }
    legend = set(re.findall(r'y="16.0" text-anchor="start" font-size="11" fill="#1a1a1a">([^<]+)<', svgs["Who was compared"]))
    assert legend == {k for k, v in occurring.items() if v}
    assert occurring["outside the common support"] == 0  # so the check above left an absent colour out
    # interval cells do not wrap
    assert "td.ci, td.num { white-space: nowrap;" in runs["coarsened_exact"]["html"]
    assert not re.search(r"<td>\[", runs["coarsened_exact"]["html"])


def test_a_long_tail_is_cut_at_the_99th_percentile_with_a_note():
    rng = np.random.default_rng(3)
    counts = {g: np.bincount(np.minimum((rng.exponential(4.0 + g, 20_000)).astype(int), 59), minlength=60) for g in (0, 1)}
    bins = [{"low": float(k), "high": float(k + 1), "treated": g, "n_units": int(counts[g][k]), "sum_w": float(counts[g][k])} for k in range(60) for g in (0, 1)]
    # independently: the first bin by which both groups hold 99% of their units
    cum = {g: np.cumsum(counts[g]) / counts[g].sum() for g in (0, 1)}
    k = next(i for i in range(60) if cum[0][i] >= 0.99 and cum[1][i] >= 0.99)
    svg, note = plots.distribution_plot("pre_minutes", bins)
    assert note is not None and f"drawn up to {k + 1:,.4g}" in note
    assert f"{100 * (1 - cum[1][k]):.1f}% of the enrolled and {100 * (1 - cum[0][k]):.1f}% of the comparison" in note
    ticks = [float(t.replace("−", "-").replace(",", "")) for t in re.findall(r'text-anchor="middle" font-size="11" fill="#1a1a1a">([−\d.,]+)<', svg)]
    assert ticks and max(ticks) <= k + 1


def test_plots_draw_no_withheld_share():
    from test_privacy import planted_results

    r = planted_results()
    page = render_html(r)
    level = _svgs(page)["Levels of district before and after matching"]
    assert "withheld (small count)" in level
    assert level.count("<rect") < 3 * 4 + 4  # the withheld levels draw no bars (two of three)
    md = render_markdown(r)
    assert "0.014" not in page and "0.014" not in md  # 3 / 219, the planted level's share


def test_the_demo_says_what_it_builds(tmp_path):
    from sqlmatch.demo_run import build_demo
    from sqlmatch.runner import Progress

    stream = io.StringIO()
    build_demo(tmp_path, riders=600, seed=5, progress=Progress(stream=stream))
    lines = stream.getvalue().splitlines()
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb"), read_only=True) as con:
        for table in ("riders", "trips"):
            n = con.execute(f"SELECT COUNT(*) FROM {table}").fetchone()[0]
            (line,) = [x for x in lines if re.search(rf"demo warehouse: {table}\s", x)]
            assert f"{n:,} rows written" in line
    assert lines[-1].startswith("sqlmatch: demo warehouse built in")


def test_the_enrolled_outline_breaks_at_a_withheld_bin():
    bins = [{"low": float(k), "high": float(k + 1), "treated": g, "n_units": (None if (g, k) == (1, 2) else 50), "sum_w": (None if (g, k) == (1, 2) else 50.0)} for k in range(6) for g in (0, 1)]
    svg, _ = plots.distribution_plot("x", bins, clip=False)
    outlines = re.findall(rf'<path d="([^"]+)" stroke="{plots.TREATED}" fill="none"', svg)
    panels = [d for d in outlines if d.count("H") > 1]  # the legend's swatch is one short path
    assert len(panels) == 2 and all(d.count("M") == 2 for d in panels)  # bins 0-1, then 3-5: no line through bin 2


def test_the_html_shows_the_subgroup_effects_the_markdown_shows(demo_db):
    from sqlmatch.spec import parse_spec

    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(demo_db)
    raw["subgroups"] = [{"feature": "age_band"}]
    results = api.run(parse_spec(raw), keep_tables=False)
    page, md = render_html(results), render_markdown(results)
    assert "<h2>Effects by subgroup</h2>" in page
    shown = results.subgroups[0].shown(results.min_cell_size)
    assert shown and not any(x["withheld"] for x in shown)
    for x in shown:
        cell = f"[{x['ci_low']:,.3f}, {x['ci_high']:,.3f}]"
        assert f"{x['estimate']:,.3f} {cell}" in md
        assert f"<td class='num'>{x['estimate']:,.3f}</td><td class='ci'>{cell}</td>" in page
    assert "Cochran's Q" in page


@pytest.mark.parametrize(
    "cell, words",
    [("1,458", "the 1,458 weighted enrolled units"), ("<10", "fewer than 10 weighted enrolled units"), ("–", "the weighted enrolled units (count withheld, see the sample table)")],
)
def test_sentences_name_a_withheld_or_small_count_in_words(cell, words):
    """The sample table's cells ("<10", "–" for a withheld count) read as words in the report's sentences."""
    from sqlmatch.report.words import counted

    assert counted(cell, "weighted enrolled units") == words
