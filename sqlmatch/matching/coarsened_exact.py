"""Coarsened exact matching (Iacus, King & Porro 2012, Political Analysis 20:1).

Numeric features are cut into bins, categorical features are kept exact; units sharing every
bin form a cell (see strata.py for strata and weights). Cut points come from the spec, or are
computed in the warehouse when `matching.coarsen` is set: "quantiles" (equal-count bins) or
"sturges" (equal-width bins, ceil(log2 n + 1) of them; Sturges 1926, JASA 21:65).
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlmatch.errors import SpecError
from sqlmatch.matching.base import MatchingMethod, OptionInput
from sqlmatch.spec_values import read_int
from sqlmatch.matching.strata import Axis, strata_steps

COARSEN_RULES = ("quantiles", "sturges")
OPTION_KEYS = ("cut_points", "coarsen", "coarsen_bins")

DESCRIPTION = "coarsened exact matching: strata from cut points (given, or quantile/Sturges bins computed in SQL) and exact categorical levels"


@dataclass(frozen=True)
class Coarsening:
    feature: str
    kind: str  # cuts | quantiles | sturges | exact
    cuts: tuple[float, ...] | None = None
    bins: int = 0

    @property
    def column(self) -> str:
        return f"{self.feature}__bin"


def coarsenings(spec) -> list[Coarsening]:
    m = spec.matching
    out = []
    for name in m.on:
        if spec.feature(name).categorical:
            out.append(Coarsening(name, "exact"))
        elif name in m.cut_points:
            out.append(Coarsening(name, "cuts", cuts=m.cut_points[name]))
        else:
            out.append(Coarsening(name, m.coarsen, bins=m.coarsen_bins))
    return out


def steps(ctx, model=None):
    spec = ctx.spec
    on = ", ".join(spec.matching.on)
    plan = coarsenings(spec)
    if all(c.kind in ("cuts", "exact") for c in plan):
        # every cut point is known when compiling: coarsen inline, no extra table
        axes = [Axis(c.feature, "cuts", c.cuts) if c.kind == "cuts" else Axis(c.feature, "exact") for c in plan]
        return strata_steps(ctx, axes, source="measures", title="Coarsened exact matching", cell_text=f"its coarsened features ({on})")
    coarsen = ctx.table_step(
        "coarsened_exact_bins",
        "coarsened_exact_bins",
        writes="coarsened",
        reads=[ctx.display("measures")],
        purpose="Coarsened exact matching: each unit's bin on every matching feature (cut points computed in SQL).",
        axes=plan,
        measures_table=ctx.table("measures"),
    )
    axes = [Axis(c.column, "given") for c in plan]
    return [coarsen] + strata_steps(ctx, axes, source="coarsened", title="Coarsened exact matching", cell_text=f"its coarsened features ({on})")


def read_options(table: dict, given: OptionInput) -> dict:
    """matching.cut_points / coarsen / coarsen_bins."""
    names = [f.name for f in given.features]
    cuts_raw = table.get("cut_points", {})
    if not isinstance(cuts_raw, dict):
        raise SpecError("matching.cut_points", "must be a table of feature name = [cut points].")
    cut_points: dict[str, tuple[float, ...]] = {}
    for n, pts in cuts_raw.items():
        key = f"matching.cut_points.{n}"
        if n not in names:
            raise SpecError(key, f"{n!r} is not a feature.", f"use names from [[features]]: {', '.join(names)}.")
        if not isinstance(pts, list) or not pts or not all(isinstance(p, (int, float)) and not isinstance(p, bool) for p in pts):
            raise SpecError(key, "must be a non-empty list of numbers.")
        if any(b <= a for a, b in zip(pts, pts[1:])):
            raise SpecError(key, f"cut points {pts} are not strictly increasing.", "sort them and remove repeats.")
        cut_points[n] = tuple(float(p) for p in pts)
    for f in given.features:
        if f.is_missing_indicator and f.name in given.on:
            cut_points.setdefault(f.name, (0.5,))  # 0 = observed, 1 = filled: matched exactly
    coarsen = table.get("coarsen")
    if coarsen is not None and coarsen not in COARSEN_RULES:
        raise SpecError("matching.coarsen", f"must be one of {', '.join(COARSEN_RULES)}; got {coarsen!r}.")
    coarsen_bins = read_int(table, "matching", "coarsen_bins", default=5, low=2, high=100)
    if given.chosen and coarsen is None:
        categorical = {f.name for f in given.features if f.categorical}
        for n in given.on:
            if n not in categorical and n not in cut_points:
                raise SpecError(
                    f"matching.cut_points.{n}",
                    f"numeric feature {n!r} has no cut points for coarsened exact matching.",
                    f"add {n} = [..] under [matching.cut_points], set matching.coarsen = \"quantiles\" or \"sturges\", or leave it out of matching.on.",
                )
    return {"cut_points": cut_points, "coarsen": coarsen, "coarsen_bins": coarsen_bins}


METHOD = MatchingMethod(
    name="coarsened_exact",
    description=DESCRIPTION,
    steps=steps,
    uses_score=False,
    loosen="coarser cut points (matching.cut_points or matching.coarsen_bins) or fewer features in matching.on",
    option_keys=OPTION_KEYS,
    read_options=read_options,
    estimands=("att", "atc", "ate"),
)
