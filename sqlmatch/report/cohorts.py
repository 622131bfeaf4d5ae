"""Markdown for a multi-cohort run: the pooled table first, then each cohort's own report."""

from __future__ import annotations

from sqlmatch.report.markdown import render_markdown


def _x(v, digits=3):
    return "–" if v is None else f"{v:,.{digits}f}"


def render_cohorts_markdown(c) -> str:
    months = [r.cohort for r in c.cohorts]
    lines = [
        f"# sqlmatch study `{c.study}`: cohorts {months[0]} to {months[-1]}",
        "",
        "Each enrolment month is matched and estimated on its own; the pooled effect weights each month by its number "
        "of enrolled units (fixed weights). The months share units (a never-enrolled control serves in every month), so "
        "their effects covary: the pooled interval counts that, from each unit's contributions to every month's effect "
        "summed in the warehouse. \"If independent\" is the standard error the same weights would have if the months "
        "shared no unit. Q and I² measure how much the months disagree beyond chance, their covariances counted (I² near "
        "0: consistent; above about 50%: the months differ, and the pooled figure hides that).",
        "",
        "| outcome | pooled effect | 95% interval | SE | SE if independent | months | Q (p) | I² |",
        "|---|---:|---|---:|---:|---:|---|---:|",
    ]
    notes = []
    for p in c.pooled:
        qp = "–" if p.q_p_value is None else f"{p.q:.2f} ({p.q_p_value:.3f})"
        i2 = "–" if p.i_squared is None else f"{p.i_squared:.0%}"
        lines.append(
            f"| {p.outcome} | {_x(p.estimate)} | [{_x(p.ci_low)}, {_x(p.ci_high)}] | {_x(p.std_error)} | {_x(p.std_error_if_independent)} "
            f"| {p.cohorts} | {qp} | {i2} |"
        )
        if p.note and p.note not in notes:
            notes.append(p.note)
    lines += [""] + [f"> {n}" for n in notes] + ([""] if notes else [])
    lines += ["", "| cohort | " + " | ".join(p.outcome for p in c.pooled) + " |", "|---|" + "---:|" * len(c.pooled)]
    for r in c.cohorts:
        lines.append(f"| {r.cohort} | " + " | ".join(_x(r.effect(p.outcome).estimate) for p in c.pooled) + " |")
    lines.append("")
    for r in c.cohorts:
        lines += ["---", "", render_markdown(r).replace("# sqlmatch study", "## sqlmatch study", 1)]
    return "\n".join(lines)
