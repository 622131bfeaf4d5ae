"""Coarsened exact matching (Iacus, King & Porro 2012, Political Analysis 20:1).

Numeric features are cut into bins at the spec's cut points, categorical features are kept
exact; units sharing every bin form a cell (see strata.py for strata and weights).
"""

from __future__ import annotations

from sqlmatch.matching.strata import Axis, strata_steps

DESCRIPTION = "coarsened exact matching: strata from cut points on numeric features and exact categorical levels"
NEEDS_SCORE = False


def axes(spec) -> list[Axis]:
    out = []
    for name in spec.matching.on:
        feature = spec.feature(name)
        if feature.categorical:
            out.append(Axis(feature=name, kind="exact"))
        else:
            out.append(Axis(feature=name, kind="cuts", cuts=spec.matching.cut_points[name]))
    return out


def steps(ctx, model=None):
    on = list(ctx.spec.matching.on)
    return strata_steps(
        ctx,
        axes(ctx.spec),
        source="measures",
        title="Coarsened exact matching",
        cell_text=f"its coarsened features ({', '.join(on)})",
    )
