"""Stratification shared by every stratum-based method: units are grouped into cells (by
coarsened features, exact levels or score bins); cells holding both treated and control units
become strata, the rest are dropped and counted; weights give the effect on the treated.

    treated weight 1;  control weight in stratum s: (n_T,s / n_C,s) * (N_C / N_T)

over matched units (Iacus, King & Porro 2012, for coarsened exact matching; the same weights
serve subclassification on the propensity score).
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Axis:
    """One axis of the cells: `kind` is "cuts" (coarsen on cut points), "exact" (categorical
    level, NULL its own level) or "given" (a bin already computed by an earlier step)."""

    feature: str
    kind: str
    cuts: tuple[float, ...] | None = None

    @property
    def column(self) -> str:
        return self.feature if self.kind == "given" else f"{self.feature}__bin"


def strata_steps(ctx, axes: list[Axis], source: str, title: str, cell_text: str):
    """Steps writing <study>_cells, <study>_weighted_units (every unit's measures with its stratum and
    weight; one row per unit, so no separate table of weights is needed) and the one-row
    matching_summary."""
    return [
        ctx.table_step(
            "strata_cells",
            "strata_cells",
            writes="cells",
            reads=[ctx.display(source)],
            purpose=f"{title}: cells with treated/control counts; cells with both become strata.",
            title=title,
            cell_text=cell_text,
            bins=axes,
            source_table=ctx.table(source),
        ),
        ctx.table_step(
            "weighted_units",
            "strata_weights",
            writes="weighted_units",
            reads=list(dict.fromkeys([ctx.display("measures"), ctx.display(source), ctx.display("cells")])),
            purpose="Matching weights for the effect on the treated, beside every unit's features and outcomes (NULL if unmatched).",
            title=title,
            bins=axes,
            columns=ctx.weighted_columns(),
            measures_table=ctx.table("measures"),
            source_table=ctx.table(source),
            # cells from the measures themselves (cut points known when compiling): no join back
            inline=source == "measures",
            estimand=ctx.spec.matching.estimand,
            cells_table=ctx.table("cells"),
        ),
        ctx.query_step(
            "matching_summary",
            "strata_summary",
            reads=[ctx.display("cells")],
            purpose=f"Units and strata kept and dropped by {title.lower()}.",
            title=title,
            cells_table=ctx.table("cells"),
        ),
    ]
