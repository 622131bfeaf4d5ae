"""HTML report: one self-contained file (inline SVG plots, inline CSS, no network), drawn from
the aggregates in StudyResults only. No statistics are computed here.

Colours: treated vermillion, control blue (Okabe & Ito's colour-blind-safe palette); before
matching hollow or light, after matching filled or dark.
"""

from __future__ import annotations

import html
import io
import math

from sqlmatch.privacy import flow_texts, sample_flow, suppress_histograms, suppress_levels
from sqlmatch.results import StudyResults

TREATED = "#D55E00"
CONTROL = "#0072B2"
GREY = "#6b6b6b"
SMD_REFERENCE = 0.1  # common practice (Austin 2009)


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 9, "axes.spines.top": False, "axes.spines.right": False, "svg.fonttype": "none"})
    return plt


def _svg(fig) -> str:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", bbox_inches="tight")
    _pyplot().close(fig)
    text = buf.getvalue()
    return text[text.index("<svg") :]


def _e(text) -> str:
    return html.escape(str(text))


def _fmt(v, digits=3) -> str:
    return "–" if v is None or (isinstance(v, float) and not math.isfinite(v)) else f"{v:,.{digits}f}"


# -------------------------------------------------------------------------------------------- plots


def balance_plot(r: StudyResults) -> str:
    plt = _pyplot()
    rows = [b for b in suppress_levels(r.balance, r.matching, r.min_cell_size) if b.smd_before is not None]
    if not rows:
        return ""
    rows.sort(key=lambda b: abs(b.smd_before))
    fig, ax = plt.subplots(figsize=(6.2, 0.28 * len(rows) + 1.0))
    y = range(len(rows))
    ax.scatter([abs(b.smd_before) for b in rows], y, facecolors="none", edgecolors=GREY, label="before matching", zorder=3)
    ax.scatter([abs(b.smd_after) if b.smd_after is not None else math.nan for b in rows], y, color="black", label="after matching", zorder=3)
    for i, b in enumerate(rows):
        if b.smd_after is not None:
            ax.plot([abs(b.smd_before), abs(b.smd_after)], [i, i], color="#c8c8c8", lw=1, zorder=2)
    ax.axvline(SMD_REFERENCE, color=GREY, ls="--", lw=1)
    ax.set_yticks(list(y), [b.covariate for b in rows])
    ax.set_xlabel("|standardized mean difference|  (dashed: 0.1)")
    ax.legend(loc="lower right", frameon=False)
    return _svg(fig)


def effects_plot(r: StudyResults) -> str:
    plt = _pyplot()
    n = len(r.effects)
    if n == 0:
        return ""
    fig, axes = plt.subplots(n, 1, figsize=(6.2, 0.9 * n + 0.4), squeeze=False)
    for ax, e in zip(axes[:, 0], r.effects):
        if e.ci_low is not None:
            ax.plot([e.ci_low, e.ci_high], [0, 0], color="black", lw=2)
        ax.scatter([e.estimate], [0], color="black", zorder=3, label="matched estimate, 95% interval")
        if e.naive.estimate is not None:
            ax.scatter([e.naive.estimate], [0], facecolors="none", edgecolors=GREY, zorder=3, label="unmatched difference")
        truth = (r.demo_truth or {}).get(e.outcome)
        if truth is not None:
            ax.scatter([truth], [0], marker="x", color=TREATED, zorder=4, label="simulated truth (demo)")
        ax.axvline(0, color=GREY, lw=0.8)
        ax.set_yticks([0], [e.outcome])
        ax.set_ylim(-1, 1)
    axes[0, 0].legend(loc="upper center", bbox_to_anchor=(0.5, 1.9), ncol=3, frameon=False, fontsize=8)
    fig.tight_layout()
    return _svg(fig)


def _histogram_panel(ax, bins, weighted: bool, title: str, mirror: bool = False):
    for group, colour in ((1, TREATED), (0, CONTROL)):
        rows = sorted((b for b in bins if b["treated"] == group), key=lambda b: b["low"])
        values = [(b["sum_w"] if weighted else b["n_units"]) for b in rows]
        total = sum(v for v in values if v) or 1.0
        shares = [(v or 0.0) / total for v in values]
        sign = -1 if (mirror and group == 0) else 1
        ax.bar([b["low"] for b in rows], [sign * s for s in shares], width=[b["high"] - b["low"] for b in rows], align="edge", color=colour, alpha=0.75, label="treated" if group else "control")
    ax.set_title(title, fontsize=9)
    ax.axhline(0, color=GREY, lw=0.6)


def overlap_plot(bins) -> str:
    plt = _pyplot()
    fig, axes = plt.subplots(1, 2, figsize=(6.2, 2.4), sharey=True)
    _histogram_panel(axes[0], bins, False, "before matching", mirror=True)
    _histogram_panel(axes[1], bins, True, "after matching (weighted)", mirror=True)
    axes[0].set_ylabel("share (control below)")
    for ax in axes:
        ax.set_xlabel("propensity score, logit scale")
    axes[1].legend(frameon=False, fontsize=8)
    fig.tight_layout()
    return _svg(fig)


def distribution_plots(histograms: dict) -> str:
    plt = _pyplot()
    names = [n for n in histograms if not n.startswith("propensity score")]
    if not names:
        return ""
    fig, axes = plt.subplots(len(names), 2, figsize=(6.2, 1.7 * len(names)), squeeze=False)
    for row, name in zip(axes, names):
        _histogram_panel(row[0], histograms[name], False, f"{name}: before")
        _histogram_panel(row[1], histograms[name], True, f"{name}: after")
    axes[0, 1].legend(frameon=False, fontsize=8)
    fig.tight_layout()
    return _svg(fig)


def flow_plot(r: StudyResults) -> str:
    plt = _pyplot()
    m = r.matching
    flow = sample_flow(m, r.min_cell_size)
    fig, ax = plt.subplots(figsize=(6.2, 1.5))
    groups = [("enrolled", "treated", m.n_treated), ("not enrolled", "control", m.n_control)]
    for i, (label, group, total) in enumerate(groups):
        rows = flow[group]
        # withheld counts (small, or revealing a small one) are drawn as one segment of their sum
        withheld = total - sum(v for k, v in rows.items() if k != "in_study" and v is not None)
        left = 0
        for value, colour, text in ((rows["matched"], "#009E73", "matched"), (rows["no_comparable"], "#E69F00", "no comparable unit"), (rows["outside_support"], "#999999", "outside common support"), (withheld if rows["in_study"] is not None else 0, "#DDDDDD", "not shown (small counts)")):
            share = (value or 0) / total if total else 0
            ax.barh(i, share, left=left, color=colour, label=text if i == 0 else None)
            left += share
    ax.set_yticks([0, 1], [g[0] for g in groups])
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of units in the study")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, 1.5), ncol=3, frameon=False, fontsize=8)
    return _svg(fig)


# -------------------------------------------------------------------------------------------- page

CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; max-width: 52rem; margin: 2rem auto; padding: 0 1rem; color: #1a1a1a; line-height: 1.45; }
h1 { font-size: 1.5rem; } h2 { font-size: 1.15rem; margin-top: 2rem; border-bottom: 1px solid #ddd; padding-bottom: .2rem; }
table { border-collapse: collapse; margin: .6rem 0; font-size: .9rem; } th, td { padding: .25rem .6rem; border-bottom: 1px solid #eee; text-align: right; }
th:first-child, td:first-child { text-align: left; } .note { color: #555; font-size: .88rem; } .caution { background: #fff7e6; border-left: 4px solid #E69F00; padding: .6rem 1rem; }
svg { max-width: 100%; height: auto; }
"""


def render_html(r: StudyResults) -> str:
    mc = r.min_cell_size
    m = r.matching
    flow = flow_texts(m, mc)
    w = r.windows
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>sqlmatch: {_e(r.study)}, cohort {_e(r.cohort)}</title>",
        f"<style>{CSS}</style></head><body>",
        f"<h1>Did enrolment change outcomes? Study <code>{_e(r.study)}</code>, cohort {_e(r.cohort)}</h1>",
        f"<p>Units that enrolled in {_e(r.cohort)} are compared with units that had not enrolled, matched on how they "
        f"behaved before ({_e(w['pre'][0])} to {_e(w['pre'][1])}). Outcomes are measured from {_e(w['post'][0])} to "
        f"{_e(w['post'][1])}; the enrolment month is in neither window. Method: <b>{_e(m.method)}</b>.</p>",
        "<h2>Effects on the enrolled</h2>",
        effects_plot(r),
        "<table><tr><th>outcome</th><th>effect</th><th>95% interval</th><th>enrolled mean</th><th>comparison mean</th><th>unmatched difference</th></tr>",
    ]
    for e in r.effects:
        parts.append(
            f"<tr><td>{_e(e.outcome)} <span class='note'>({_e(e.kind)})</span></td><td>{_fmt(e.estimate)}</td>"
            f"<td>[{_fmt(e.ci_low)}, {_fmt(e.ci_high)}]</td><td>{_fmt(e.mean_treated)}</td><td>{_fmt(e.mean_control)}</td><td>{_fmt(e.naive.estimate)}</td></tr>"
        )
    parts.append("</table>")
    sentences = [getattr(e, "sensitivity", None) for e in r.effects]
    sentences = [(e.outcome, s.get("sentence")) for e, s in zip(r.effects, sentences) if isinstance(s, dict) and s.get("sentence")]
    if sentences:
        parts.append("<h2>How strong would hidden confounding have to be?</h2><ul>")
        parts += [f"<li><b>{_e(o)}</b>: {_e(text)}</li>" for o, text in sentences]
        parts.append("</ul>")
    parts += [
        "<h2>Who was compared</h2>",
        flow_plot(r),
        "<table><tr><th></th><th>enrolled</th><th>not enrolled</th></tr>",
        *[
            f"<tr><td>{label}</td><td>{_e(flow['treated'][row])}</td><td>{_e(flow['control'][row])}</td></tr>"
            for row, label in (("in_study", "in the study"), ("matched", "matched"), ("outside_support", "dropped: outside the common support"), ("no_comparable", "dropped: no comparable unit"))
        ],
        "</table>",
        *([f"<p class='note'>Counts under {mc} are not shown, nor (–) a second count from which one could be worked out.</p>"] if any(v == "–" for g in flow.values() for v in g.values()) else []),
        "<h2>Balance</h2>",
        "<p class='note'>A standardized mean difference below 0.1 is usually read as balanced (common practice).</p>",
        balance_plot(r),
    ]
    if r.imbalance:
        parts.append(
            f"<p class='note'>Multivariate L1 imbalance (0 = same distributions, 1 = no overlap): {_fmt(r.imbalance['l1_before'])} before, "
            f"{_fmt(r.imbalance['l1_after'])} after, on {_e(r.imbalance['histogram'])}.</p>"
        )
    hist = suppress_histograms(r.histograms, mc) or {}
    score = next((v for k, v in hist.items() if k.startswith("propensity score")), None)
    if score:
        parts += ["<h2>Overlap of propensity scores</h2>", overlap_plot(score)]
    if hist:
        parts += ["<h2>Feature distributions</h2>", distribution_plots(hist)]
    if r.warnings:
        parts += ["<h2>Warnings</h2>", "<div class='caution'><ul>"] + [f"<li>{_e(t)}</li>" for t in r.warnings] + ["</ul></div>"]
    parts += ["<h2>Assumptions and cautions</h2>", "<div class='caution'><ul>"]
    parts += [f"<li>{_e(a)}</li>" for a in r.assumptions]
    parts += [
        "</ul></div>",
        f"<p class='note'>Only aggregates left the warehouse ({r.rows_fetched} result rows). Counts under {mc} are not shown.</p>",
        "</body></html>",
    ]
    return "\n".join(parts)
