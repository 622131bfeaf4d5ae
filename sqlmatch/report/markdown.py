"""Markdown report: sized for a pull-request comment. Renders StudyResults; no statistics here."""

from __future__ import annotations

from sqlmatch.results import StudyResults

SMD_REFERENCE = 0.1  # |SMD| below 0.1 read as balanced: common practice (Austin 2009)


def _n(value: int | None, min_cell: int) -> str:
    """Counts below the minimum cell size are suppressed."""
    if value is None:
        return "–"
    return f"<{min_cell}" if 0 < value < min_cell else f"{value:,}"


def _x(value: float | None, digits: int = 3) -> str:
    return "–" if value is None else f"{value:,.{digits}f}"


def _interval(lo: float | None, hi: float | None, digits: int = 3) -> str:
    return "–" if lo is None or hi is None else f"[{lo:,.{digits}f}, {hi:,.{digits}f}]"


def render_markdown(r: StudyResults) -> str:
    mc = r.min_cell_size
    m = r.matching
    w = r.windows
    lines = [
        f"# sqlmatch study `{r.study}`: cohort {r.cohort}",
        "",
        f"Units that enrolled in {r.cohort} are compared with units that had not enrolled, matched on their "
        f"behaviour before enrolment. Features: {w['pre'][0]} to {w['pre'][1]} (exclusive); outcomes: "
        f"{w['post'][0]} to {w['post'][1]} (exclusive); the enrolment month itself is in neither window.",
        "",
        "## Sample",
        "",
        f"Method: **{m.method}**.",
        "",
        "| | enrolled (treated) | not enrolled (control) |",
        "|---|---:|---:|",
        f"| in the study | {_n(m.n_treated, mc)} | {_n(m.n_control, mc)} |",
        f"| matched | {_n(m.n_treated_matched, mc)} | {_n(m.n_control_matched, mc)} |",
        f"| dropped: outside the common support | {_n(m.n_treated_outside_support, mc)} | {_n(m.n_control_outside_support, mc)} |",
        f"| dropped: no comparable unit in the stratum | {_n(m.n_treated - m.n_treated_matched - m.n_treated_outside_support, mc)} | "
        f"{_n(m.n_control - m.n_control_matched - m.n_control_outside_support, mc)} |",
        "",
        f"Strata used: {m.strata:,}; cells dropped for lacking an enrolled or a non-enrolled unit: {m.strata_dropped:,}.",
        "",
        "## Effects on the enrolled",
        "",
        "| outcome | kind | effect | 95% interval | enrolled mean | matched comparison mean | unmatched difference |",
        "|---|---|---:|---|---:|---:|---:|",
    ]
    for e in r.effects:
        lines.append(
            f"| {e.outcome} | {e.kind} | {_x(e.estimate)} | {_interval(e.ci_low, e.ci_high)} | "
            f"{_x(e.mean_treated)} | {_x(e.mean_control)} | {_x(e.naive_estimate)} |"
        )
    if r.demo_truth:
        lines += ["", "Simulated truth (demo only): " + ", ".join(f"{k} = {v:.3f}" for k, v in sorted(r.demo_truth.items())) + "."]
    lines += [
        "",
        "## Balance",
        "",
        f"Standardized mean difference (SMD) of each feature, before and after matching; |SMD| < {SMD_REFERENCE} "
        "is usually read as balanced (common practice). Variance ratios near 1 are good.",
        "",
        "| feature | SMD before | SMD after | variance ratio before | variance ratio after |",
        "|---|---:|---:|---:|---:|",
    ]
    for b in r.balance:
        flag = " ⚠" if b.smd_after is not None and abs(b.smd_after) >= SMD_REFERENCE else ""
        lines.append(
            f"| {b.covariate} | {_x(b.smd_before)} | {_x(b.smd_after)}{flag} | {_x(b.variance_ratio_before, 2)} | {_x(b.variance_ratio_after, 2)} |"
        )
    if r.imbalance:
        lines += [
            "",
            f"Multivariate imbalance L1 (0 = same distribution, 1 = no overlap; Iacus, King & Porro): "
            f"{r.imbalance['l1_before']:.3f} before matching, {r.imbalance['l1_after']:.3f} after, on {r.imbalance['histogram']}.",
        ]
    lines += ["", "## Assumptions and cautions", ""]
    lines += [f"- {a}" for a in r.assumptions]
    lines += [
        "",
        f"Only aggregates left the warehouse: {r.rows_fetched} result rows in all. Counts under {mc} are shown as <{mc}.",
        "",
    ]
    return "\n".join(lines)
