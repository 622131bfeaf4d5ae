"""HTML report: one self-contained file (inline SVG plots, inline CSS, no network) holding
everything the Markdown report holds, plus the study's design and a plain-words reading of each
effect. Drawn from the aggregates in StudyResults only (small counts suppressed through
privacy.py); no statistics are computed here."""

from __future__ import annotations

import html
import math

from sqlmatch.privacy import suppress_histograms, suppress_levels
from sqlmatch.report import plots
from sqlmatch.report.markdown import ESTIMAND_HEADINGS
from sqlmatch.report.words import design_lines, effect_sentence, flow_segments, groups_sentence, provenance_text, sample_rows, window_length
from sqlmatch.results import StudyResults, warning_kind

SMD_REFERENCE = plots.SMD_REFERENCE


def _e(text) -> str:
    return html.escape(str(text))


def _fmt(v, digits=3) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)):
        return "–"
    text = f"{v:,.{digits}f}"
    return text[1:] if text.startswith("-") and not text.strip("-0.,") else text  # no "-0.000"


def _ci(lo, hi, digits=3) -> str:
    return "–" if lo is None or hi is None else f"[{_fmt(lo, digits)}, {_fmt(hi, digits)}]"


def _pct(v) -> str:
    return "–" if v is None or not math.isfinite(v) else f"{100 * v:+.1f}%"


def _pct_ci(lo, hi) -> str:
    return "–" if lo is None or hi is None else f"[{_pct(lo)}, {_pct(hi)}]"


def balance_plot(r: StudyResults) -> str:
    """The |SMD| dot plot (also written beside report.md as balance.svg)."""
    return plots.balance_plot(suppress_levels(r.balance, r.matching, r.min_cell_size))


CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; max-width: 60rem; margin: 2rem auto; padding: 0 1rem; color: #1a1a1a; line-height: 1.45; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.15rem; margin-top: 2.2rem; border-bottom: 1px solid #ddd; padding-bottom: .2rem; } h3 { font-size: 1rem; margin-bottom: .2rem; }
table { border-collapse: collapse; margin: .6rem 0; font-size: .88rem; } th, td { padding: .25rem .55rem; border-bottom: 1px solid #eee; text-align: right; vertical-align: top; }
th { font-weight: 600; } th:first-child, td:first-child { text-align: left; } td.ci, td.num { white-space: nowrap; font-variant-numeric: tabular-nums; }
table.design td, table.figures td:nth-child(2), table.figures th:nth-child(2) { text-align: left; } table.design td:first-child { white-space: nowrap; color: #444; }
.note { color: #555; font-size: .88rem; } .caution { background: #fff7e6; border-left: 4px solid #E69F00; padding: .5rem 1rem; margin: .8rem 0; }
.reading { background: #f3f8fc; border-left: 4px solid #0072B2; padding: .5rem 1rem; margin: .8rem 0; }
.kind { display: inline-block; font-size: .75rem; background: #E69F00; color: white; border-radius: 3px; padding: 0 .35rem; margin-right: .3rem; }
.plot { margin: .6rem 0; } svg { width: 100%; max-width: 56rem; height: auto; } p.tail { margin-top: -.4rem; } code { font-size: .9em; }
"""


def render_html(r: StudyResults) -> str:
    mc = r.min_cell_size
    m = r.matching
    w = r.windows
    d = r.design or {}
    treatment = d.get("treatment", "enrolment")
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>sqlmatch: {_e(r.study)}, cohort {_e(r.cohort)}</title>",
        f"<style>{CSS}</style></head><body>",
        f"<h1>Did {_e(treatment)} change outcomes? Study <code>{_e(r.study)}</code>, cohort {_e(r.cohort)}</h1>",
        f"<p>Units that enrolled in {_e(r.cohort)} are compared with units that had not enrolled, matched on how they "
        f"behaved before ({_e(w['pre'][0])} to {_e(w['pre'][1])}, exclusive). Outcomes are measured from {_e(w['post'][0])} to "
        f"{_e(w['post'][1])} (exclusive); the enrolment month is in neither window. Method: <b>{_e(m.method)}</b> "
        "(the design is listed in full below).</p>",
    ]
    # ---- the reading first: what the numbers say, and on what they rest
    parts += ["<h2>What the result means</h2>", "<div class='reading'><ul>"]
    parts += [f"<li><b>{_e(e.outcome)}</b>: {_e(effect_sentence(r, e))}</li>" for e in r.effects]
    parts += [
        "</ul>",
        "<p>This reading holds only if the matching removed the differences that matter: <b>no unmeasured confounding</b> "
        "(nothing outside the listed features drives both enrolment and the outcome), <b>overlap</b> (the enrolled have "
        "comparable non-enrolled units; those without are dropped, so the effect describes the matched enrolled units) and "
        "<b>no interference</b> (one unit's enrolment does not change another's outcome). The sensitivity section says how "
        "strong a hidden factor would have to be; the cautions at the end say more.</p></div>",
    ]
    if r.warnings:
        parts += [f"<h2>Warnings ({len(r.warnings)})</h2>", "<div class='caution'><ul>"]
        parts += [f"<li><span class='kind'>{_e(warning_kind(t) or 'other')}</span>{_e(t)}</li>" for t in r.warnings]
        parts += ["</ul></div>"]
    # ---- effects
    parts += [
        f"<h2>{_e(ESTIMAND_HEADINGS.get(r.effects[0].estimand if r.effects else 'att', 'Effects on the enrolled'))}</h2>",
        f"<div class='plot'>{plots.effects_plot(r.effects, r.demo_truth)}</div>",
        "<table><tr><th>outcome</th><th>effect</th><th>95% interval</th><th>relative lift</th><th>lift 95% interval</th>"
        "<th>enrolled mean</th><th>comparison mean</th><th>unmatched difference</th></tr>",
    ]
    for e in r.effects:
        parts.append(
            f"<tr><td>{_e(e.outcome)} <span class='note'>({_e(e.kind)})</span></td><td class='num'>{_fmt(e.estimate)}</td>"
            f"<td class='ci'>{_ci(e.ci_low, e.ci_high)}</td><td class='num'>{_pct(e.lift.estimate)}</td><td class='ci'>{_pct_ci(e.lift.ci_low, e.lift.ci_high)}</td>"
            f"<td class='num'>{_fmt(e.mean_treated)}</td><td class='num'>{_fmt(e.mean_control)}</td><td class='num'>{_fmt(e.naive.estimate)}</td></tr>"
        )
    parts.append("</table>")
    parts.append(
        "<p class='note'>Effect: the enrolled mean minus the matched comparison mean (binary outcomes: the risk difference). "
        "Relative lift: the effect as a share of the comparison mean (binary: risk ratio − 1; from the plain comparison also when the "
        "effect is regression-adjusted). Unmatched difference: the same "
        "comparison before matching.</p>"
    )
    extra = []
    for e in r.effects:
        if e.unadjusted is not None:
            extra.append(
                f"<tr><td>{_e(e.outcome)}</td><td>unadjusted (the effect above is adjusted by a within-stratum regression on "
                f"{_e(', '.join(e.adjusted_for) or 'no feature')})</td><td class='num'>{_fmt(e.unadjusted.estimate)}</td>"
                f"<td class='ci'>{_ci(e.unadjusted.ci_low, e.unadjusted.ci_high)}</td></tr>"
            )
        if e.kind == "binary" and e.risk_ratio is not None:
            extra.append(f"<tr><td>{_e(e.outcome)}</td><td>risk ratio</td><td class='num'>{_fmt(e.risk_ratio.estimate, 2)}</td><td class='ci'>{_ci(e.risk_ratio.ci_low, e.risk_ratio.ci_high, 2)}</td></tr>")
        if e.did_twin and e.did is not None:
            extra.append(
                f"<tr><td>{_e(e.outcome)} − {_e(e.did_twin)}</td><td>difference-in-differences</td><td class='num'>{_fmt(e.did.estimate)}</td>"
                f"<td class='ci'>{_ci(e.did.ci_low, e.did.ci_high)}</td></tr>"
            )
    if extra:
        parts += ["<table class='figures'><tr><th>outcome</th><th>figure</th><th>estimate</th><th>95% interval</th></tr>", *extra, "</table>"]
        if any(e.did_twin for e in r.effects):
            parts.append(
                "<p class='note'>Difference-in-differences: the effect on the outcome minus its pre-window twin, on the matched "
                "sample. The two are compared as they are (pre window "
                f"{_e(window_length(w['pre'], w['unit']))}, post window {_e(window_length(w['post'], w['unit']))}); no rescaling to a common length.</p>"
            )
    if r.demo_truth:
        parts.append("<p class='note'>Simulated truth (demo only): " + ", ".join(f"{_e(k)} = {v:.3f}" for k, v in sorted(r.demo_truth.items())) + ".</p>")
    # ---- who was compared
    segments, totals = flow_segments(r)
    rows = sample_rows(r)
    parts += [
        "<h2>Who was compared</h2>",
        f"<div class='plot'>{plots.flow_plot(segments, totals)}</div>",
        "<table><tr><th></th><th>enrolled</th><th>not enrolled</th></tr>",
        *[f"<tr><td>{_e(label)}</td><td class='num'>{_e(t)}</td><td class='num'>{_e(c)}</td></tr>" for label, t, c in rows],
        "</table>",
        f"<p>{_e(groups_sentence(r))}</p>",
    ]
    if any(v == "–" for _, t, c in rows for v in (t, c)):
        parts.append(f"<p class='note'>Counts under {mc} are not shown, nor (–) a second count from which one could be worked out.</p>")
    # ---- balance
    shown = suppress_levels(r.balance, m, mc)
    parts += [
        "<h2>Balance</h2>",
        f"<p class='note'>Standardized mean difference (SMD) of each feature, before and after matching; |SMD| below {SMD_REFERENCE} is "
        "usually read as balanced (common practice). Variance ratios (enrolled ÷ comparison) near 1 are good. Categorical features "
        "are compared level by level as 0/1 indicators.</p>",
        f"<div class='plot'>{balance_plot(r)}</div>",
        "<table><tr><th>feature</th><th>enrolled mean before</th><th>comparison mean before</th><th>SMD before</th><th>SMD after</th>"
        "<th>comparison mean after</th><th>variance ratio before</th><th>variance ratio after</th></tr>",
    ]
    for b in shown:
        flag = " ⚠" if b.smd_after is not None and abs(b.smd_after) > SMD_REFERENCE else ""
        parts.append(
            f"<tr><td>{_e(b.covariate)}</td><td class='num'>{_fmt(b.mean_treated_before)}</td><td class='num'>{_fmt(b.mean_control_before)}</td>"
            f"<td class='num'>{_fmt(b.smd_before)}</td><td class='num'>{_fmt(b.smd_after)}{flag}</td><td class='num'>{_fmt(b.mean_control_after)}</td>"
            f"<td class='num'>{_fmt(b.variance_ratio_before, 2)}</td><td class='num'>{_fmt(b.variance_ratio_after, 2)}</td></tr>"
        )
    parts.append("</table>")
    if any(b.kind == "level" and b.smd_before is None for b in shown):
        parts.append(f"<p class='note'>Levels held by fewer than {mc} units of a group are withheld (–), with one more level so the shares cannot be worked out.</p>")
    if r.imbalance:
        parts.append(
            f"<p class='note'>Multivariate L1 imbalance (Iacus, King &amp; Porro; 0 = same distributions, 1 = no overlap): {_fmt(r.imbalance['l1_before'])} before, "
            f"{_fmt(r.imbalance['l1_after'])} after, on {_e(r.imbalance['histogram'])}.</p>"
        )
    # ---- distributions
    hist = suppress_histograms(r.histograms, mc) or {}
    numeric = [n for n in hist if not n.startswith("propensity score")]
    levels: dict[str, list] = {}
    for b in shown:
        if b.kind == "level":
            levels.setdefault(b.covariate.split("=", 1)[0], []).append(b)
    if numeric or levels:
        parts += [
            "<h2>Feature distributions</h2>",
            "<p class='note'>Share of each group in each bin, before matching (unit counts) and after (matching weights). "
            "Enrolled: vermillion outline; comparison: light blue fill; hatched: withheld (small count).</p>",
        ]
        for name in numeric:
            svg, note = plots.distribution_plot(name, hist[name])
            parts.append(f"<div class='plot'>{svg}</div>")
            if note:
                parts.append(f"<p class='note tail'>{_e(note)}</p>")
        for feature, rows_ in levels.items():
            parts.append(f"<div class='plot'>{plots.level_plot(feature, rows_)}</div>")
    score = next((v for k, v in hist.items() if k.startswith("propensity score")), None)
    if score:
        svg, _ = plots.distribution_plot("propensity score (logit)", score, clip=False, what="logit propensity score")
        parts += ["<h2>Overlap of propensity scores</h2>", f"<div class='plot'>{svg}</div>"]
    # ---- sensitivity
    parts += _sensitivity(r)
    # ---- subgroups (levels as SubgroupEffects.shown gives them: small ones withheld)
    if r.subgroups:
        parts += [
            "<h2>Effects by subgroup</h2>",
            "<table><tr><th>subgroup</th><th>level</th><th>outcome</th><th>effect</th><th>95% interval</th><th>enrolled</th><th>comparison</th></tr>",
        ]
        for sg in r.subgroups:
            for x in sg.shown(mc):
                if x["withheld"]:
                    effect, interval = "withheld (few units)", ""
                elif x["estimate"] is None:
                    effect, interval = "no estimate (a group is empty)", ""
                else:
                    effect, interval = _fmt(x["estimate"]), _ci(x["ci_low"], x["ci_high"])
                n_t = f"<{mc}" if x["n_treated"] is None else f"{x['n_treated']:,}"
                n_c = f"<{mc}" if x["n_control"] is None else f"{x['n_control']:,}"
                parts.append(
                    f"<tr><td>{_e(sg.subgroup)}</td><td>{_e(x['level'])}</td><td>{_e(sg.outcome)}</td><td class='num'>{_e(effect)}</td>"
                    f"<td class='ci'>{interval}</td><td class='num'>{_e(n_t)}</td><td class='num'>{_e(n_c)}</td></tr>"
                )
        parts.append("</table><ul>")
        for sg in r.subgroups:
            if sg.p_value is not None:
                verdict = "the effect differs between the levels more than chance would explain" if sg.p_value < 0.05 else "no clear difference between the levels"
                parts.append(f"<li>{_e(sg.subgroup)}, {_e(sg.outcome)}: {html.escape(sg.test, quote=False)} = {sg.q:.2f} on {sg.df} df, p = {sg.p_value:.2g} ({verdict}).</li>")
        parts.append("<li>With many subgroups and outcomes, some differences are chance; a subgroup chosen after seeing the results proves little.</li></ul>")
    # ---- placebo check
    if r.placebo is not None:
        pw = r.placebo.results.windows
        parts += [
            "<h2>Placebo check</h2>",
            f"<p>The same design placed {r.placebo.months_before} months earlier: the same enrolled units against the same "
            f"comparison pool, features over {_e(pw['pre'][0])} .. {_e(pw['pre'][1])} and outcomes over {_e(pw['post'][0])} .. "
            f"{_e(pw['post'][1])}, all before anyone in the cohort enrolled, so every true effect is zero.</p>",
            f"<div class='plot'>{plots.effects_plot(r.placebo.results.effects)}</div>",
            "<ul>",
            *[f"<li>{_e(text)}</li>" for text in r.placebo.readings()],
            "</ul>",
        ]
    # ---- design and provenance
    parts += ["<h2>Design</h2>", "<table class='design'>"]
    parts += [f"<tr><td>{_e(k)}</td><td>{_e(v)}</td></tr>" for k, v in design_lines(r)]
    parts += ["<tr><td>Outcomes</td><td>" + _e(", ".join(f"{e.outcome} ({e.kind}, {e.estimator})" for e in r.effects)) + "</td></tr>", "</table>"]
    prov = provenance_text(r)
    if prov:
        parts.append(f"<p class='note'>Provenance: {_e(prov)}</p>")
    # ---- cautions
    parts += ["<h2>Assumptions and cautions</h2>", "<div class='caution'><ul>"]
    parts += [f"<li>{_e(a)}</li>" for a in r.assumptions]
    parts += [
        "</ul></div>",
        f"<p class='note'>Only aggregates left the warehouse ({r.rows_fetched} result rows). Counts under {mc} are shown as &lt;{mc}.</p>",
        "</body></html>",
    ]
    return "\n".join(parts)


def _sensitivity(r: StudyResults) -> list[str]:
    if not r.effects:
        return []
    out = [
        "<h2>How strong would hidden confounding have to be?</h2>",
        "<table><tr><th>outcome</th><th>E-value</th><th>E-value of the interval</th><th>robustness value</th>"
        "<th>robustness value (95% interval)</th><th>partial R² of enrolment</th></tr>",
    ]
    for e in r.effects:
        s = e.sensitivity or {}

        def share(key):
            v = s.get(key)
            return "–" if v is None else f"{100 * v:.1f}%"

        out.append(
            f"<tr><td>{_e(e.outcome)}</td><td class='num'>{_fmt(s.get('e_value'), 2)}</td><td class='num'>{_fmt(s.get('e_value_ci'), 2)}</td>"
            f"<td class='num'>{share('robustness_value')}</td><td class='num'>{share('robustness_value_alpha')}</td><td class='num'>{share('partial_r2')}</td></tr>"
        )
    out.append("</table><ul>")
    for e in r.effects:
        s = e.sensitivity or {}
        if s.get("sentence"):
            out.append(f"<li><b>{_e(e.outcome)}</b>: {_e(s['sentence'])}</li>")
        if s.get("robustness_value") is None and s.get("robustness_reason"):
            out.append(f"<li><b>{_e(e.outcome)}</b>: no robustness value: {_e(s['robustness_reason'])}</li>")
    out.append("</ul>")
    out.append(
        "<p class='note'>E-values (VanderWeele &amp; Ding 2017) are on the risk-ratio scale: for binary outcomes from the risk ratio; "
        "for others from the standardized effect d = effect / SD through RR ≈ exp(0.91 d). Robustness values (Cinelli &amp; Hazlett 2020) "
        "come from a weighted regression of each outcome on enrolment among the matched units, adjusting for the numeric features.</p>"
    )
    reasons = sorted({e.sensitivity.get("rosenbaum_reason") for e in r.effects if e.sensitivity and e.sensitivity.get("rosenbaum") is None} - {None})
    if reasons:
        out.append("<p class='note'>Rosenbaum bounds: not computed. " + " ".join(_e(x) for x in reasons) + "</p>")
    return out
