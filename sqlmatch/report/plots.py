"""The report's plots, drawn from the aggregates in StudyResults (after small-count suppression)
as SVG text (report/svg.py). No statistics are computed here.

Treated (enrolled) is vermillion, comparison blue. In the distributions the enrolled are an
outline and the comparison a light fill, so where they overlap both stay visible."""

from __future__ import annotations

import math

from sqlmatch.report.svg import CONTROL, GREY, LIGHT, TREATED, Scale, Svg, nice_ticks

WIDTH = 720
SMD_REFERENCE = 0.1  # |SMD| below 0.1 read as balanced: common practice (Austin 2009)
WITHHELD_STRIP = 10  # px: a withheld bin is a hatched strip on the axis, its height unknown
TAIL_SHARE = 0.99  # distributions are drawn up to where 99% of both groups lie; the rest is noted


def _finite(v) -> bool:
    return v is not None and isinstance(v, (int, float)) and math.isfinite(v)


# -------------------------------------------------------------------------------------- balance


def balance_plot(rows) -> str:
    """|SMD| per feature before (hollow) and after (filled) matching, the 0.1 line dashed.
    `rows`: BalanceRow list, already suppressed."""
    rows = [b for b in rows if _finite(b.smd_before)]
    if not rows:
        return ""
    rows = sorted(rows, key=lambda b: -abs(b.smd_before))
    left, right, top, row_h = 190, WIDTH - 20, 34, 20
    height = top + row_h * len(rows) + 44
    high = max([abs(b.smd_before) for b in rows] + [abs(b.smd_after) for b in rows if _finite(b.smd_after)] + [SMD_REFERENCE * 1.5])
    x = Scale(0, high * 1.05, left, right)
    s = Svg(WIDTH, height, "Standardized mean differences before and after matching")
    s.legend(left, 14, [("hollow:" + GREY, "before matching"), ("dot:#1a1a1a", "after matching"), ("dash:" + GREY, f"{SMD_REFERENCE} (common practice)")])
    bottom = top + row_h * len(rows)
    for i, b in enumerate(rows):
        y = top + row_h * i + row_h / 2
        s.line(left, y, right, y, colour="#f2f2f2")
        s.text(left - 8, y + 4, b.covariate, anchor="end")
        before = abs(b.smd_before)
        if _finite(b.smd_after):
            s.line(x(before), y, x(abs(b.smd_after)), y, colour=LIGHT, width=1.5)
        s.circle(x(before), y, 4.5, "white", stroke=GREY, title=f"{b.covariate}: SMD before {b.smd_before:+.3f}")
        if _finite(b.smd_after):
            s.circle(x(abs(b.smd_after)), y, 4.5, "#1a1a1a", title=f"{b.covariate}: SMD after {b.smd_after:+.3f}")
    s.line(x(SMD_REFERENCE), top, x(SMD_REFERENCE), bottom, colour=GREY, dash="4 3")
    s.x_axis(x, bottom + 4, nice_ticks(0, high * 1.05), "|standardized mean difference|")
    return s.render()


# -------------------------------------------------------------------------------------- effects


def effects_plot(effects, truth: dict | None = None) -> str:
    """One panel per outcome, each on its own scale (the outcomes have different units): the
    matched effect and its 95% interval, the unmatched difference, the simulated truth (demo)."""
    effects = [e for e in effects if _finite(e.estimate)]
    if not effects:
        return ""
    truth = truth or {}
    left, right, top, panel = 190, WIDTH - 24, 34, 54
    s = Svg(WIDTH, top + panel * len(effects) + 6, "Effects on the enrolled with 95% intervals")
    entries = [("dot:#1a1a1a", "matched effect, 95% interval"), ("hollow:" + GREY, "unmatched difference")]
    if any(e.outcome in truth for e in effects):
        entries.append(("cross:" + TREATED, "simulated truth (demo)"))
    s.legend(left, 14, entries)
    for i, e in enumerate(effects):
        y0 = top + panel * i
        values = [0.0, e.estimate] + [v for v in (e.ci_low, e.ci_high, e.naive.estimate, truth.get(e.outcome)) if _finite(v)]
        lo, hi = min(values), max(values)
        pad = (hi - lo) * 0.08 or 1.0
        ticks = nice_ticks(lo - pad, hi + pad, 6)
        x = Scale(min(ticks[0], lo - pad), max(ticks[-1], hi + pad), left, right)
        y = y0 + 14
        s.text(left - 8, y + 4, e.outcome, anchor="end", weight="bold")
        s.line(x(0), y0 + 2, x(0), y0 + 26, colour=LIGHT)
        if _finite(e.ci_low) and _finite(e.ci_high):
            s.line(x(e.ci_low), y, x(e.ci_high), y, colour="#1a1a1a", width=2.5)
            for v in (e.ci_low, e.ci_high):
                s.line(x(v), y - 5, x(v), y + 5, colour="#1a1a1a", width=1.5)
        if _finite(e.naive.estimate):
            s.circle(x(e.naive.estimate), y, 4.5, "white", stroke=GREY)
        s.circle(x(e.estimate), y, 4.5, "#1a1a1a")
        if _finite(truth.get(e.outcome)):
            s.cross(x(truth[e.outcome]), y, 4.5, TREATED)
        s.x_axis(x, y0 + 26, [t for t in ticks if x.p0 - 0.5 <= x(t) <= x.p1 + 0.5])
    return s.render()


# ------------------------------------------------------------------------------- distributions


def _ticks_over(high: float) -> list[float]:
    """Ticks from 0 to at least `high`, so the axis reaches above the tallest bar."""
    ticks = nice_ticks(0, high, 4)
    if ticks[-1] < high - 1e-12:
        ticks.append(round(ticks[-1] + (ticks[1] - ticks[0] if len(ticks) > 1 else high), 12))
    return ticks


def _group_bins(bins, group: int):
    return sorted((b for b in bins if b["treated"] == group), key=lambda b: b["low"])


def _shares(rows, weighted: bool) -> list[float | None]:
    values = [b["sum_w"] if weighted else b["n_units"] for b in rows]
    total = sum(v for v in values if v) or 1.0
    return [None if v is None else v / total for v in values]


def tail_cut(bins) -> tuple[int | None, dict[int, float]]:
    """Index of the last bin to draw, so that at least TAIL_SHARE of each group's units (before
    matching, bins shown) lie at or below it; None when every bin is drawn. With the share of each
    group above the cut."""
    groups = {g: _shares(_group_bins(bins, g), False) for g in (0, 1)}
    n = max((len(v) for v in groups.values()), default=0)
    for k in range(n - 1):
        above = {g: sum(x or 0.0 for x in v[k + 1 :]) for g, v in groups.items()}
        if all(a <= 1 - TAIL_SHARE + 1e-12 for a in above.values()):
            return (k if k < n - 2 else None), above
    return None, {}


def _histogram(s: Svg, bins, weighted: bool, x0: float, y0: float, w: float, h: float, title: str, last: int | None, y_label: str | None) -> None:
    treated, control = _group_bins(bins, 1), _group_bins(bins, 0)
    if last is not None:
        treated, control = treated[: last + 1], control[: last + 1]
    st, sc = _shares(_group_bins(bins, 1), weighted), _shares(_group_bins(bins, 0), weighted)
    st, sc = st[: len(treated)], sc[: len(control)]
    high = max([v for v in st + sc if v is not None] + [0.01])
    ticks = _ticks_over(high)
    y = Scale(0, max(ticks[-1], high), y0 + h, y0)
    lo = min(b["low"] for b in treated + control)
    hi = max(b["high"] for b in treated + control)
    x = Scale(lo, hi, x0, x0 + w)
    s.text(x0 + w / 2, y0 - 8, title, anchor="middle", size=12, weight="bold")
    for b, v in zip(control, sc):
        if v is None:
            s.rect(x(b["low"]), y0 + h - WITHHELD_STRIP, x(b["high"]) - x(b["low"]), WITHHELD_STRIP, "url(#withheld)", title="withheld (small count)")
        elif v > 0:
            s.rect(x(b["low"]), y(v), x(b["high"]) - x(b["low"]), y(0) - y(v), CONTROL, opacity=0.3)
    # the enrolled as a step outline over the fill, broken at withheld bins (their height is unknown)
    d, open_ = [], False
    for b, v in zip(treated, st):
        if v is None:
            if open_:
                d.append(f"V{y(0):.1f}")
            open_ = False
            continue
        if not open_:
            d.append(f"M{x(b['low']):.1f},{y(0):.1f}")
            open_ = True
        d.append(f"V{y(v):.1f}H{x(b['high']):.1f}")
    if open_:
        d.append(f"V{y(0):.1f}")
    if d:
        s.path("".join(d), stroke=TREATED, width=2)
    for b, v in zip(treated, st):
        if v is None:
            s.rect(x(b["low"]), y0 + h - WITHHELD_STRIP, x(b["high"]) - x(b["low"]), WITHHELD_STRIP, "url(#withheld)", title="withheld (small count)")
    s.y_axis(y, x0, ticks, y_label, as_percent=True)
    s.x_axis(x, y0 + h, nice_ticks(lo, hi, 5))


PATTERN = (
    '<defs><pattern id="withheld" width="6" height="6" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">'
    '<rect width="6" height="6" fill="white"/><line x1="0" y1="0" x2="0" y2="6" stroke="#bbbbbb" stroke-width="2"/></pattern></defs>'
)


def distribution_plot(name: str, bins, clip: bool = True, what: str | None = None) -> tuple[str, str | None]:
    """Before and after matching side by side for one numeric feature (or the score). Returns the
    SVG and a note on the clipped tail (None when nothing is clipped)."""
    last, above = tail_cut(bins) if clip else (None, {})
    s = Svg(WIDTH, 222, f"Distribution of {name} before and after matching")
    s.add(PATTERN)
    entries = [("outline:" + TREATED, "enrolled"), ("fill:" + CONTROL, "not enrolled (comparison)")]
    if any(b["n_units"] is None for b in bins):
        entries.append(("hatch:url(#withheld)", "withheld (small count)"))
    s.legend(64, 14, entries)
    _histogram(s, bins, False, 64, 52, 290, 130, f"{what or name}: before matching", last, "share of the group")
    _histogram(s, bins, True, 64 + 290 + 56, 52, 290, 130, "after matching (weighted)", last, None)
    note = None
    if last is not None:
        edge = _group_bins(bins, 1)[last]["high"]
        withheld = any(b["n_units"] is None and b["low"] >= edge for b in bins)
        note = (
            f"Long tail cut: {name} is drawn up to {edge:,.4g}; above it lie {100 * above.get(1, 0):.1f}% of the enrolled and "
            f"{100 * above.get(0, 0):.1f}% of the comparison units before matching (not drawn)"
            + ("; of the bins shown, withheld ones not counted." if withheld else ".")
        )
    return s.render(), note


def level_plot(feature: str, rows) -> str:
    """Share of each level of a categorical feature, enrolled vs comparison, before and after
    matching (`rows`: its suppressed BalanceRow levels)."""
    levels = [(b.covariate.split("=", 1)[1], b) for b in rows]
    row_h, top = 26, 52
    height = top + row_h * len(levels) + 46
    s = Svg(WIDTH, height, f"Levels of {feature} before and after matching")
    s.add(PATTERN)
    s.legend(150, 14, [("solid:" + TREATED, "enrolled"), ("solid:" + CONTROL, "not enrolled (comparison)")])
    shares = [v for _, b in levels for v in (b.mean_treated_before, b.mean_control_before, b.mean_treated_after, b.mean_control_after) if _finite(v)]
    high = max(shares + [0.05])
    ticks = _ticks_over(high)
    for col, (title, t_attr, c_attr) in enumerate(
        (("before matching", "mean_treated_before", "mean_control_before"), ("after matching (weighted)", "mean_treated_after", "mean_control_after"))
    ):
        x0 = 150 + col * 290
        x = Scale(0, max(ticks[-1], high), x0, x0 + 250)
        s.text(x0 + 125, top - 10, f"{feature}: {title}" if col == 0 else title, anchor="middle", size=12, weight="bold")
        for i, (level, b) in enumerate(levels):
            y = top + row_h * i
            if col == 0:
                s.text(x0 - 8, y + row_h / 2 + 4, level, anchor="end")
            t, c = getattr(b, t_attr), getattr(b, c_attr)
            if not _finite(t) and not _finite(c):
                s.rect(x0, y + 3, 250, row_h - 6, "url(#withheld)", title="withheld (small count)")
                s.text(x0 + 4, y + row_h / 2 + 4, "withheld (small count)", colour=GREY)
                continue
            for j, (v, colour) in enumerate(((t, TREATED), (c, CONTROL))):
                if _finite(v):
                    s.rect(x0, y + 3 + j * 10, x(v) - x0, 9, colour, opacity=0.85)
        s.x_axis(x, top + row_h * len(levels) + 2, ticks, "share of the group", as_percent=True)
    return s.render()


# ---------------------------------------------------------------------------------------- flow


def flow_plot(segments: dict[str, list[tuple[str, int | None, str]]], totals: dict[str, int]) -> str:
    """Who was compared: per group a bar split into its parts. `segments`: group label ->
    [(part label, count or None when withheld, colour)]; only parts that occur get a legend entry."""
    left, right, top, bar = 120, WIDTH - 20, 40, 24
    s = Svg(WIDTH, top + 2 * (bar + 14) + 40, "Who was compared")
    seen: dict[str, str] = {}
    for i, (group, parts) in enumerate(segments.items()):
        total = totals[group] or 1
        y = top + i * (bar + 14)
        s.text(left - 8, y + bar / 2 + 4, group, anchor="end")
        cursor = left
        for label, value, colour in parts:
            if not value:
                continue
            w = (right - left) * value / total
            s.rect(cursor, y, w, bar, colour)
            seen.setdefault(label, colour)
            if w > 60:
                s.text(cursor + w / 2, y + bar / 2 + 4, f"{100 * value / total:.0f}%", anchor="middle", colour="white" if colour != "#DDDDDD" else "#1a1a1a")
            cursor += w
    x = Scale(0, 1, left, right)
    s.x_axis(x, top + 2 * (bar + 14) - 8, [0, 0.25, 0.5, 0.75, 1.0], "share of the group's units in the study", as_percent=True)
    s.legend(left, 16, [("solid:" + c, lbl) for lbl, c in seen.items()])
    return s.render()


