"""Coarsened exact matching (Iacus, King & Porro 2012, Political Analysis 20:1).

Numeric features are cut into bins at the spec's cut points, categorical features are kept
exact; units sharing every bin form a cell. Cells with both treated and control units become
strata, the rest are dropped and counted. Weights give the effect on the treated.
"""

from __future__ import annotations

from dataclasses import dataclass

DESCRIPTION = "coarsened exact matching: strata from cut points on numeric features and exact categorical levels"


@dataclass(frozen=True)
class Bin:
    feature: str
    column: str
    cuts: tuple[float, ...] | None  # None: categorical, matched exactly


def bins(spec) -> list[Bin]:
    out = []
    for name in spec.matching.on:
        feature = spec.feature(name)
        cuts = None if feature.categorical else spec.matching.cut_points[name]
        out.append(Bin(feature=name, column=f"{name}__bin", cuts=cuts))
    return out


def steps(ctx):
    spec = ctx.spec
    b = bins(spec)
    return [
        ctx.table_step(
            "cem_cells",
            "cem_cells",
            writes="cem_cells",
            reads=[ctx.display("measures")],
            purpose="Coarsened exact matching: cells of coarsened features with treated/control counts.",
            on=list(spec.matching.on),
            bins=b,
            measures_table=ctx.table("measures"),
        ),
        ctx.table_step(
            "weights",
            "cem_weights",
            writes="weights",
            reads=[ctx.display("measures"), ctx.display("cem_cells")],
            purpose="Matching weights for the effect on the treated (matched units only).",
            bins=b,
            measures_table=ctx.table("measures"),
            cells_table=ctx.table("cem_cells"),
        ),
        ctx.query_step(
            "matching_summary",
            "cem_summary",
            reads=[ctx.display("cem_cells")],
            purpose="Units and strata kept and dropped by coarsened exact matching.",
            cells_table=ctx.table("cem_cells"),
        ),
    ]
