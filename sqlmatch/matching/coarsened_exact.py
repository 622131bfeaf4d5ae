"""Coarsened exact matching (Iacus, King & Porro 2012, Political Analysis 20:1).

Numeric features are cut into bins, categorical features are kept exact; units sharing every
bin form a cell (see strata.py for strata and weights). Cut points come from the spec, or are
computed in the warehouse when `matching.coarsen` is set: "quantiles" (equal-count bins) or
"sturges" (equal-width bins, ceil(log2 n + 1) of them; Sturges 1926, JASA 21:65).
"""

from __future__ import annotations

from dataclasses import dataclass

from sqlmatch.matching.base import MatchingMethod
from sqlmatch.matching.strata import Axis, strata_steps

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


METHOD = MatchingMethod(
    name="coarsened_exact",
    description=DESCRIPTION,
    steps=steps,
    uses_score=False,
    loosen="coarser cut points (matching.cut_points or matching.coarsen_bins) or fewer features in matching.on",
)
