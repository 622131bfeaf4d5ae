"""Markdown report: sized for a pull-request comment. Renders StudyResults; no statistics here."""

from __future__ import annotations

from sqlmatch.privacy import count_text, suppress_levels
from sqlmatch.report.words import design_lines, effect_sentence, groups_sentence, provenance_text, sample_rows, window_length
from sqlmatch.results import StudyResults, warning_kind

SMD_REFERENCE = 0.1  # |SMD| below 0.1 read as balanced: common practice (Austin 2009)


def _n(value: int | None, min_cell: int) -> str:
    return count_text(value, min_cell)


def _withheld(rows) -> bool:
    return any(v == "–" for _, t, c in rows for v in (t, c))


def _x(value: float | None, digits: int = 3) -> str:
    return "–" if value is None else f"{value:,.{digits}f}"


def _interval(lo: float | None, hi: float | None, digits: int = 3) -> str:
    return "–" if lo is None or hi is None else f"[{lo:,.{digits}f}, {hi:,.{digits}f}]"


def _pct(value: float | None) -> str:
    return "–" if value is None else f"{100.0 * value:+.1f}%"


def _pct_interval(lo: float | None, hi: float | None) -> str:
    return "–" if lo is None or hi is None else f"[{100.0 * lo:+.1f}%, {100.0 * hi:+.1f}%]"


def _effect_notes(r: StudyResults) -> list[str]:
    """Unadjusted effects beside adjusted ones, risk ratios of binary outcomes and
    differences-in-differences, in words."""
    lines = []
    for e in r.effects:
        if e.unadjusted is not None:
            lines.append(
                f"- **{e.outcome}**: the effect above is adjusted by a within-stratum regression on "
                f"{', '.join(e.adjusted_for) or 'no feature'}; without the adjustment (the plain matched comparison) it is "
                f"{_x(e.unadjusted.estimate)} {_interval(e.unadjusted.ci_low, e.unadjusted.ci_high)}."
            )
    for e in r.effects:
        if e.kind == "binary" and e.risk_ratio is not None:
            lines.append(
                f"- **{e.outcome}** (binary): the effect above is the risk difference; the risk ratio is "
                f"{_x(e.risk_ratio.estimate, 2)} {_interval(e.risk_ratio.ci_low, e.risk_ratio.ci_high, 2)}, i.e. the enrolled were "
                f"{_x(e.risk_ratio.estimate, 2)} times as likely to have the outcome as comparable non-enrolled units."
            )
    w = r.windows
    for e in r.effects:
        if e.did_twin:
            lines.append(
                f"- **{e.outcome} − {e.did_twin}** (difference-in-differences on the matched sample): "
                f"{_x(e.did.estimate)} {_interval(e.did.ci_low, e.did.ci_high)}. The two measures are compared as they "
                f"are: {e.did_twin} covers the pre window ({window_length(w['pre'], w['unit'])}), {e.outcome} the post window "
                f"({window_length(w['post'], w['unit'])}); no rescaling to a common length."
            )
    if lines:
        lines = ["", *lines]
    return lines


def _sensitivity_section(r: StudyResults) -> list[str]:
    lines = [
        "",
        "## Sensitivity to unmeasured confounding",
        "",
        "How strong would a factor that is not among the features have to be to explain each effect away?",
        "",
        "| outcome | E-value | E-value of the interval | robustness value | robustness value (95% interval) | partial R² of enrolment |",
        "|---|---:|---:|---:|---:|---:|",
    ]
    for e in r.effects:
        s = e.sensitivity or {}
        rv, rva, r2 = s.get("robustness_value"), s.get("robustness_value_alpha"), s.get("partial_r2")
        lines.append(
            f"| {e.outcome} | {_x(s.get('e_value'), 2)} | {_x(s.get('e_value_ci'), 2)} | "
            f"{'–' if rv is None else f'{100 * rv:.1f}%'} | {'–' if rva is None else f'{100 * rva:.1f}%'} | "
            f"{'–' if r2 is None else f'{100 * r2:.1f}%'} |"
        )
    lines.append("")
    for e in r.effects:
        s = e.sensitivity or {}
        if s.get("sentence"):
            lines.append(f"- **{e.outcome}**: {s['sentence']}")
        if s.get("robustness_value") is None and s.get("robustness_reason"):
            lines.append(f"- **{e.outcome}**: no robustness value: {s['robustness_reason']}")
    adjusted = next((e.sensitivity.get("adjusted_for") for e in r.effects if e.sensitivity and e.sensitivity.get("adjusted_for")), None)
    lines += [
        "",
        "E-values (VanderWeele & Ding 2017) are on the risk-ratio scale: for binary outcomes from the risk ratio; "
        "for other outcomes from the standardized effect d = effect / SD through RR ≈ exp(0.91 d), with the pooled SD "
        "of the outcome among the matched units. Robustness values (Cinelli & Hazlett 2020) come from a weighted "
        "regression of each outcome on enrolment among the matched units, with the matching weights as analytic weights, "
        + (f"adjusting for the numeric features ({', '.join(adjusted)})" if adjusted else "adjusting for the numeric features")
        + "; the categorical features are not in that regression, and its enrolment coefficient can differ a little "
        "from the stratified effect above. A ratio outcome enters it linearised, as R + (numerator - R x denominator) / mean denominator "
        "with R and the mean denominator of the unit's group, so that its enrolment coefficient is about the ratio effect above.",
    ]
    reasons = sorted({e.sensitivity.get("rosenbaum_reason") for e in r.effects if e.sensitivity and e.sensitivity.get("rosenbaum") is None} - {None})
    if reasons:
        lines += ["", "Rosenbaum bounds: not computed. " + " ".join(reasons)]
    return lines


ESTIMAND_HEADINGS = {
    "att": "Effects on the enrolled",
    "atc": "Effects on the comparison units, had they enrolled (ATC)",
    "ate": "Effects on everyone in the matched strata (ATE)",
}



def render_markdown(r: StudyResults, balance_image: str | None = None) -> str:
    """Markdown sized for a pull-request comment; `balance_image` names the balance plot written
    beside the report, if any."""
    mc = r.min_cell_size
    m = r.matching
    w = r.windows
    rows = sample_rows(r)
    lines = [
        f"# sqlmatch study `{r.study}`: cohort {r.cohort}",
        "",
        f"Units that enrolled in {r.cohort} are compared with units that had not enrolled, matched on their "
        f"behaviour before enrolment. Features: {w['pre'][0]} to {w['pre'][1]} (exclusive); outcomes: "
        f"{w['post'][0]} to {w['post'][1]} (exclusive); the enrolment month itself is in neither window.",
        "",
        "## What the result means",
        "",
        *[f"- **{e.outcome}**: {effect_sentence(r, e)}" for e in r.effects],
        "",
        "This reading holds only if there is no unmeasured confounding (nothing outside the listed features drives both "
        "enrolment and the outcome), overlap (enrolled units without comparable non-enrolled ones are dropped, so the effect "
        "describes the matched enrolled units) and no interference (one unit's enrolment does not change another's outcome); "
        "see the sensitivity figures and the cautions below.",
    ]
    if r.warnings:
        lines += ["", f"## Warnings ({len(r.warnings)})", ""] + [f"- **{warning_kind(t) or 'other'}**: {t}" for t in r.warnings]
    lines += [
        "",
        "## Sample",
        "",
        f"Method: **{m.method}**.",
        "",
        "| | enrolled (treated) | not enrolled (control) |",
        "|---|---:|---:|",
        *[f"| {label} | {t} | {c} |" for label, t, c in rows],
        *(["", f"Counts under {mc} are not shown, nor (–) a second count from which one could be worked out."] if _withheld(rows) else []),
        "",
        groups_sentence(r),
        "",
        "## " + ESTIMAND_HEADINGS.get(r.effects[0].estimand if r.effects else "att", "Effects on the enrolled"),
        "",
        f"| outcome | kind | effect | 95% interval | relative lift | lift 95% interval | enrolled mean | {'weighted' if 'balancing' in (r.design or {}) else 'matched'} comparison mean | unmatched difference |",
        "|---|---|---:|---|---:|---|---:|---:|---:|",
    ]
    for e in r.effects:
        lines.append(
            f"| {e.outcome} | {e.kind} | {_x(e.estimate)} | {_interval(e.ci_low, e.ci_high)} | {_pct(e.lift.estimate)} | "
            f"{_pct_interval(e.lift.ci_low, e.lift.ci_high)} | {_x(e.mean_treated)} | {_x(e.mean_control)} | {_x(e.naive.estimate)} |"
        )
    lines += [
        "",
        "Relative lift: the effect as a share of the matched comparison mean (enrolled mean ÷ comparison mean − 1; "
        "for binary outcomes the risk ratio − 1), from the plain comparison also when the effect is regression-adjusted.",
    ]
    lines += _effect_notes(r)
    if r.demo_truth:
        lines += ["", "Simulated truth (demo only): " + ", ".join(f"{k} = {v:.3f}" for k, v in sorted(r.demo_truth.items())) + "."]
    lines += [
        "",
        "## Balance",
        "",
        f"Standardized mean difference (SMD) of each feature, before and after matching; |SMD| < {SMD_REFERENCE} "
        "is usually read as balanced (common practice). Variance ratios near 1 are good.",
        *([ "", f"![|SMD| before (hollow) and after (filled) matching]({balance_image})"] if balance_image else []),
        "",
        "| feature | SMD before | SMD after | variance ratio before | variance ratio after |",
        "|---|---:|---:|---:|---:|",
    ]
    for b in suppress_levels(r.balance, m, mc):
        flag = " ⚠" if b.smd_after is not None and abs(b.smd_after) > SMD_REFERENCE else ""
        lines.append(
            f"| {b.covariate} | {_x(b.smd_before)} | {_x(b.smd_after)}{flag} | {_x(b.variance_ratio_before, 2)} | {_x(b.variance_ratio_after, 2)} |"
        )
    if r.imbalance:
        lines += [
            "",
            f"Multivariate imbalance L1 (0 = same distribution, 1 = no overlap; Iacus, King & Porro): "
            f"{r.imbalance['l1_before']:.3f} before matching, {r.imbalance['l1_after']:.3f} after, on {r.imbalance['histogram']}.",
        ]
    lines += _sensitivity_section(r)
    if r.subgroups:
        lines += ["", "## Effects by subgroup", "", "| subgroup | level | outcome | effect [95% CI] | enrolled | comparison |", "|---|---|---|---|---|---|"]
        for sg in r.subgroups:
            for x in sg.shown(mc):
                effect = "withheld (few units)" if x["withheld"] else (
                    f"{_x(x['estimate'])} [{_x(x['ci_low'])}, {_x(x['ci_high'])}]" if x["estimate"] is not None else "no estimate (a group is empty)"
                )
                n_t = f"<{mc}" if x["n_treated"] is None else f"{x['n_treated']:,}"
                n_c = f"<{mc}" if x["n_control"] is None else f"{x['n_control']:,}"
                lines.append(f"| {sg.subgroup} | {x['level']} | {sg.outcome} | {effect} | {n_t} | {n_c} |")
        lines.append("")
        for sg in r.subgroups:
            if sg.p_value is not None:
                lines.append(
                    f"- {sg.subgroup}, {sg.outcome}: {sg.test} = {sg.q:.2f} on {sg.df} df, p = {sg.p_value:.2g} "
                    + ("(the effect differs between the levels more than chance would explain)." if sg.p_value < 0.05 else "(no clear difference between the levels).")
                )
        lines.append("- With many subgroups and outcomes, some differences are chance; a subgroup chosen after seeing the results proves little.")
    if r.placebo is not None:
        pw = r.placebo.results.windows
        lines += [
            "",
            "## Placebo check",
            "",
            f"The same design placed {r.placebo.months_before} months earlier: the same enrolled units against the same "
            f"comparison pool, features over {pw['pre'][0]} .. {pw['pre'][1]} and outcomes over {pw['post'][0]} .. {pw['post'][1]}, "
            "all before anyone in the cohort enrolled, so every true effect is zero.",
            "",
        ] + [f"- {text}" for text in r.placebo.readings()]
    lines += ["", "## Design", ""] + [f"- **{k}**: {v}" for k, v in design_lines(r)]
    prov = provenance_text(r)
    if prov:
        lines += ["", f"Provenance: {prov}"]
    lines += ["", "## Assumptions and cautions", ""]
    lines += [f"- {a}" for a in r.assumptions]
    lines += [
        "",
        f"Only aggregates left the warehouse: {r.rows_fetched} result rows in all. Counts under {mc} are shown as <{mc}.",
        "",
    ]
    return "\n".join(lines)
