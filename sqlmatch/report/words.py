"""Plain words for a result: one sentence per effect a reader can repeat, and the one-line headline
the command line prints. Renders StudyResults; no statistics here."""

from __future__ import annotations

import datetime as dt
import math

from sqlmatch.results import Effect, StudyResults


def number(x: float | None) -> str:
    """A figure for a sentence: three significant digits or so, thousands separated."""
    if x is None or not math.isfinite(x):
        return "–"
    a = abs(x)
    if a >= 100:
        return f"{x:,.0f}"
    if a >= 10:
        return f"{x:,.1f}"
    if a >= 0.01 or a == 0:
        return f"{x:,.2f}"
    return f"{x:.2g}"


def pct(x: float | None) -> str:
    return "–" if x is None or not math.isfinite(x) else f"{100.0 * x:+.1f}%"


def window_length(window: list[str], unit: str) -> str:
    """Length of a [start, end) window in the study's window unit ("3 months")."""
    start, end = dt.date.fromisoformat(window[0]), dt.date.fromisoformat(window[1])
    n = (end.year - start.year) * 12 + end.month - start.month if unit == "month" else (end - start).days
    return f"{n} {unit}{'s' if n != 1 else ''}"


def _includes_zero(e: Effect) -> bool:
    return e.ci_low is not None and e.ci_high is not None and e.ci_low <= 0.0 <= e.ci_high


def effect_sentence(r: StudyResults, e: Effect) -> str:
    """What the effect means, in words: "The enrolled units had 4.56 more post_trips each over the 3
    months after enrolment than comparable units that had not enrolled (9.62 against 5.07, +90.0%)."""
    w = r.windows
    span = f"over the {window_length(w['post'], w['unit'])} from {w['post'][0]}"
    interval = f"the 95% interval of the difference is {number(e.ci_low)} to {number(e.ci_high)}"
    if e.estimate is None or not math.isfinite(e.estimate):
        return f"No effect on {e.outcome} could be estimated."
    if e.kind == "binary":
        p1, p0 = e.mean_treated, e.mean_control
        text = (
            f"{_share(p1)} of the enrolled units had {e.outcome} in the post window ({window_length(w['post'], w['unit'])} from {w['post'][0]}), against {_share(p0)} of comparable units that had not "
            f"enrolled: {100 * e.estimate:+.1f} percentage points ({_points_interval(e)})"
        )
        if e.risk_ratio is not None and e.risk_ratio.estimate is not None:
            text += f", {number(e.risk_ratio.estimate)} times as likely"
        text += "."
    else:
        more = "more" if e.estimate >= 0 else "less"
        if e.kind == "ratio":
            text = f"For the enrolled units, {e.outcome} {span} was {number(abs(e.estimate))} {'higher' if e.estimate >= 0 else 'lower'} than for comparable units that had not enrolled"
        else:
            text = f"The enrolled units had {number(abs(e.estimate))} {more} {e.outcome} each {span} than comparable units that had not enrolled"
        text += f" ({number(e.mean_treated)} against {number(e.mean_control)}"
        if e.lift.estimate is not None:
            text += f", {pct(e.lift.estimate)}"
        text += f"); {interval}."
    if _includes_zero(e):
        text += " The interval includes no effect: the data are also consistent with no change."
    return text


def _points_interval(e: Effect) -> str:
    if e.ci_low is None or e.ci_high is None:
        return "no interval"
    return f"95% interval {100 * e.ci_low:+.1f} to {100 * e.ci_high:+.1f}"


def _share(p: float | None) -> str:
    return "–" if p is None or not math.isfinite(p) else f"{100 * p:.1f}%"


def headline(e: Effect) -> str:
    """One line per outcome for the end of a run: effect, interval, relative lift."""
    if e.kind == "binary" and e.estimate is not None:
        scale = 100.0
        unit = " percentage points"
    else:
        scale, unit = 1.0, " per enrolled unit" if e.kind == "continuous" else ""
    low = None if e.ci_low is None else scale * e.ci_low
    high = None if e.ci_high is None else scale * e.ci_high
    estimate = None if e.estimate is None else scale * e.estimate
    line = f"{e.outcome}: {_signed(estimate)}{unit}, 95% interval [{number(low)}, {number(high)}]"
    if e.lift.estimate is not None:
        line += f", {pct(e.lift.estimate)} relative to the matched comparison"
    return line


def _signed(x: float | None) -> str:
    s = number(x)
    return s if s == "–" or s.startswith("-") else "+" + s
