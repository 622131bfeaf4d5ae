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
