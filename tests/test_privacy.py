"""Only aggregates leave the warehouse, small counts are never written, credentials never shown."""

from __future__ import annotations

import json

from sqlmatch.results import MatchingSummary, StudyResults


def small_results(min_cell: int = 10) -> StudyResults:
    return StudyResults(
        study="s",
        cohort="2026-03",
        dialect="duckdb",
        windows={"unit": "month", "pre": ["2025-09-01", "2026-03-01"], "cohort": ["2026-03-01", "2026-04-01"], "post": ["2026-04-01", "2026-07-01"]},
        matching=MatchingSummary("coarsened_exact", 120, 118, 3000, 7, 5, 1, 0, 0),
        balance=[],
        effects=[],
        rows_fetched=10,
        min_cell_size=min_cell,
        histograms={"pre_trips": [{"low": 0.0, "high": 1.0, "treated": 1, "n_units": 3, "sum_w": 3.0}, {"low": 0.0, "high": 1.0, "treated": 0, "n_units": 40, "sum_w": 2.0}]},
    )


def test_counts_below_the_minimum_cell_are_not_written():
    body = json.loads(small_results().to_json())
    assert body["matching"]["n_control_matched"] is None  # 7 < 10
    assert body["matching"]["n_treated"] == 120
    bins = body["histograms"]["pre_trips"]
    assert bins[0]["n_units"] is None and bins[0]["sum_w"] is None
    assert bins[1]["n_units"] == 40
    assert "7" not in json.dumps(body["matching"])


def test_the_markdown_and_html_reports_suppress_small_counts():
    from sqlmatch.report.html import render_html
    from sqlmatch.report.markdown import render_markdown

    r = small_results()
    assert "<10" in render_markdown(r)
    assert "&lt;10" in render_html(r)
    assert "| 7 |" not in render_markdown(r)


# ---------------------------------------------------------------------------------------------
# complementary suppression: a small group must not be recoverable by subtraction from any output
# ---------------------------------------------------------------------------------------------


def planted_results(min_cell: int = 10) -> StudyResults:
    """219 enrolled in the study, 215 matched, 4 with no comparable unit (the planted small
    group); a categorical feature whose level 'x' holds 3 enrolled units; a histogram with one
    bin of 2 enrolled units."""
    from sqlmatch.results import BalanceRow

    levels = [("a", 150 / 219, 0.5), ("b", 66 / 219, 0.3), ("x", 3 / 219, 0.2)]
    balance = [BalanceRow(f"district={lv}", "level", pt, pc, 0.1, None, pt, pc, 0.05, None) for lv, pt, pc in levels]
    bins = [{"low": 0.0, "high": 1.0, "treated": 1, "n_units": n, "sum_w": float(n)} for n in (120, 97, 2)]
    return StudyResults(
        study="s", cohort="2026-03", dialect="duckdb",
        windows={"unit": "month", "pre": ["2025-09-01", "2026-03-01"], "cohort": ["2026-03-01", "2026-04-01"], "post": ["2026-04-01", "2026-07-01"]},
        matching=MatchingSummary("coarsened_exact", 219, 215, 3000, 1200, 40, 3, 0, 0),
        balance=balance, effects=[], rows_fetched=10, min_cell_size=min_cell, histograms={"pre_trips": bins},
    )


def test_a_small_group_cannot_be_recovered_from_the_json_by_subtraction():
    body = json.loads(planted_results().to_json())
    m = body["matching"]
    assert m["n_treated"] == 219 and m["n_treated_no_comparable"] is None
    visible = [m[f"n_treated_{k}"] for k in ("matched", "outside_support", "no_comparable")]
    hidden = [v for v in visible if v is None]
    assert len(hidden) >= 2  # one hidden part of a shown total would follow from the others
    assert 219 - sum(v for v in visible if v is not None) >= 10  # what is hidden is not itself small
    assert 4 not in [v for v in m.values() if isinstance(v, int)]


def test_a_small_level_share_is_withheld_with_a_complement():
    body = json.loads(planted_results().to_json())
    rows = {b["covariate"]: b for b in body["balance"]}
    assert rows["district=x"]["mean_treated_before"] is None  # 3 / 219 x 219 = 3 units
    shown = [b["mean_treated_before"] for b in rows.values() if b["mean_treated_before"] is not None]
    assert len(shown) <= len(rows) - 2  # shares add to one: a second level is withheld too
    assert abs(1 - sum(shown)) * 219 >= 10


def test_a_small_histogram_bin_is_withheld_with_a_complement():
    body = json.loads(planted_results().to_json())
    counts = [b["n_units"] for b in body["histograms"]["pre_trips"]]
    assert counts.count(None) >= 2
    assert 219 - sum(c for c in counts if c is not None) >= 10


def test_reports_show_the_same_withheld_counts():
    from sqlmatch.report.html import render_html
    from sqlmatch.report.markdown import render_markdown

    r = planted_results()
    md = render_markdown(r)
    row = next(line for line in md.splitlines() if line.startswith("| dropped: no comparable unit"))
    assert "4" not in row and "<10" in row
    matched = next(line for line in md.splitlines() if line.startswith("| matched |"))
    assert "215" not in matched
    html = render_html(r)
    assert "<td>215</td>" not in html and "<td>4</td>" not in html
