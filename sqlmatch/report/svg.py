"""Plots written directly as SVG text: a few primitives (scales, ticks, marks, legends) and no
plotting library, so a report renders in milliseconds and every mark is ours to place. Colours from
Okabe & Ito's colour-blind-safe palette. Text inherits the page's font."""

from __future__ import annotations

import html
import math

TREATED = "#D55E00"  # vermillion
CONTROL = "#0072B2"  # blue
GREY = "#6b6b6b"
LIGHT = "#c8c8c8"
FONT = 11  # px, the size of tick labels; titles one px larger


def esc(text) -> str:
    return html.escape(str(text), quote=True)


def fmt_tick(v: float, step: float) -> str:
    """A tick label with as many decimals as the step needs."""
    if step <= 0 or not math.isfinite(step):
        return f"{v:g}"
    decimals = max(0, -int(math.floor(math.log10(step) + 1e-9)))
    while decimals < 6 and abs(round(step, decimals) - step) > step * 1e-6:  # 0.25 needs two
        decimals += 1
    text = f"{v:,.{decimals}f}"
    return "0" if text.strip("-0.,") == "" else text.replace("-", "−")


def nice_ticks(low: float, high: float, count: int = 5) -> list[float]:
    """Round tick values covering [low, high], steps of 1, 2 or 5 times a power of ten."""
    if not (math.isfinite(low) and math.isfinite(high)):
        return [0.0]
    if high <= low:
        high = low + (abs(low) if low else 1.0)
    raw = (high - low) / max(count, 1)
    power = 10 ** math.floor(math.log10(raw))
    step = next(m * power for m in (1, 2, 2.5, 5, 10) if m * power >= raw)
    first = math.ceil(low / step - 1e-9) * step
    ticks, v = [], first
    while v <= high + step * 1e-9:
        ticks.append(round(v, 12))
        v += step
    return ticks


class Scale:
    """Linear map from data [d0, d1] to pixels [p0, p1]."""

    def __init__(self, d0: float, d1: float, p0: float, p1: float):
        if d1 == d0:
            d0, d1 = d0 - 0.5, d1 + 0.5
        self.d0, self.d1, self.p0, self.p1 = d0, d1, p0, p1

    def __call__(self, v: float) -> float:
        return self.p0 + (v - self.d0) / (self.d1 - self.d0) * (self.p1 - self.p0)


class Svg:
    """An <svg> element built line by line; width and height in px (scaled down by the page's CSS)."""

    def __init__(self, width: float, height: float, label: str):
        self.width, self.height = width, height
        self.parts: list[str] = []
        self.label = label

    def add(self, text: str) -> None:
        self.parts.append(text)

    def text(self, x, y, s, anchor="start", size=FONT, weight="normal", colour="#1a1a1a", baseline="auto") -> None:
        extra = f' font-weight="{weight}"' if weight != "normal" else ""
        extra += f' dominant-baseline="{baseline}"' if baseline != "auto" else ""
        self.add(f'<text x="{x:.1f}" y="{y:.1f}" text-anchor="{anchor}" font-size="{size}" fill="{colour}"{extra}>{esc(s)}</text>')

    def line(self, x1, y1, x2, y2, colour=GREY, width=1.0, dash: str | None = None) -> None:
        d = f' stroke-dasharray="{dash}"' if dash else ""
        self.add(f'<line x1="{x1:.1f}" y1="{y1:.1f}" x2="{x2:.1f}" y2="{y2:.1f}" stroke="{colour}" stroke-width="{width}"{d}/>')

    def rect(self, x, y, w, h, fill, stroke="none", opacity: float | None = None, title: str | None = None) -> None:
        o = f' fill-opacity="{opacity}"' if opacity is not None else ""
        body = f"<title>{esc(title)}</title>" if title else ""
        self.add(f'<rect x="{x:.1f}" y="{y:.1f}" width="{max(w, 0):.1f}" height="{max(h, 0):.1f}" fill="{fill}" stroke="{stroke}"{o}>{body}</rect>')

    def circle(self, x, y, r, fill, stroke="none", width=1.5, title: str | None = None) -> None:
        body = f"<title>{esc(title)}</title>" if title else ""
        self.add(f'<circle cx="{x:.1f}" cy="{y:.1f}" r="{r}" fill="{fill}" stroke="{stroke}" stroke-width="{width}">{body}</circle>')

    def cross(self, x, y, r, colour, width=2.0) -> None:
        self.add(f'<path d="M{x - r:.1f},{y - r:.1f}L{x + r:.1f},{y + r:.1f}M{x - r:.1f},{y + r:.1f}L{x + r:.1f},{y - r:.1f}" stroke="{colour}" stroke-width="{width}"/>')

    def path(self, d: str, stroke="none", fill="none", width=1.5, opacity: float | None = None) -> None:
        o = f' fill-opacity="{opacity}"' if opacity is not None else ""
        self.add(f'<path d="{d}" stroke="{stroke}" fill="{fill}" stroke-width="{width}" stroke-linejoin="miter"{o}/>')

    def x_axis(self, scale: Scale, y: float, ticks: list[float], label: str | None = None, grid_to: float | None = None, as_percent: bool = False) -> None:
        step = ticks[1] - ticks[0] if len(ticks) > 1 else abs(ticks[0]) or 1.0
        self.line(scale.p0, y, scale.p1, y, colour=GREY)
        for t in ticks:
            x = scale(t)
            if grid_to is not None:
                self.line(x, grid_to, x, y, colour="#eeeeee")
            self.line(x, y, x, y + 4, colour=GREY)
            self.text(x, y + 4 + FONT, f"{100 * t:.0f}%" if as_percent else fmt_tick(t, step), anchor="middle")
        if label:
            self.text((scale.p0 + scale.p1) / 2, y + 8 + 2 * FONT, label, anchor="middle")

    def y_axis(self, scale: Scale, x: float, ticks: list[float], label: str | None = None, as_percent: bool = False) -> None:
        step = ticks[1] - ticks[0] if len(ticks) > 1 else 1.0
        self.line(x, scale.p0, x, scale.p1, colour=GREY)
        for t in ticks:
            y = scale(t)
            self.line(x - 4, y, x, y, colour=GREY)
            text = f"{100 * t:.0f}%" if as_percent else fmt_tick(t, step)
            self.text(x - 6, y + FONT / 3, text, anchor="end")
        if label:
            mid = (scale.p0 + scale.p1) / 2
            self.add(f'<text x="{x - 34:.1f}" y="{mid:.1f}" text-anchor="middle" font-size="{FONT}" fill="#1a1a1a" transform="rotate(-90 {x - 34:.1f} {mid:.1f})">{esc(label)}</text>')

    def legend(self, x: float, y: float, entries: list[tuple[str, str]]) -> None:
        """One row of legend entries: (swatch svg given its x and y, label). Swatches are drawn by
        `swatch(kind, colour)` strings: 'fill:#hex', 'outline:#hex', 'dot:#hex', 'hollow:#hex', 'cross:#hex', 'line:#hex', 'dash:#hex'."""
        cx = x
        for swatch, label in entries:
            kind, colour = swatch.split(":", 1)
            if kind == "fill":
                self.rect(cx, y - 9, 14, 10, colour, opacity=0.35)
            elif kind == "outline":
                self.path(f"M{cx:.1f},{y + 1:.1f}V{y - 9:.1f}H{cx + 14:.1f}V{y + 1:.1f}", stroke=colour, width=2)
            elif kind == "hatch":
                self.rect(cx, y - 9, 14, 10, colour, stroke="#bbbbbb")
            elif kind == "solid":
                self.rect(cx, y - 9, 14, 10, colour)
            elif kind == "dot":
                self.circle(cx + 7, y - 4, 4, colour)
            elif kind == "hollow":
                self.circle(cx + 7, y - 4, 4, "white", stroke=colour)
            elif kind == "cross":
                self.cross(cx + 7, y - 4, 4, colour)
            elif kind == "line":
                self.line(cx, y - 4, cx + 14, y - 4, colour=colour, width=2)
            elif kind == "dash":
                self.line(cx, y - 4, cx + 14, y - 4, colour=colour, width=1, dash="4 3")
            self.text(cx + 19, y, label)
            cx += 19 + 6.2 * len(label) + 18

    def render(self) -> str:
        body = "\n".join(self.parts)
        return (
            f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {self.width:.0f} {self.height:.0f}" '
            f'width="{self.width:.0f}" height="{self.height:.0f}" role="img" aria-label="{esc(self.label)}" '
            f'font-family="system-ui, -apple-system, Segoe UI, sans-serif">\n{body}\n</svg>'
        )
