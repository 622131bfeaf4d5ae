"""Matching methods, one module each, registered here (see base.MatchingMethod).

Each method's steps write one of two shapes:

    <study>_weighted_units(unit_key, treated, <every feature and outcome>, match__stratum, match__weight)

one row per unit in the study, stratum and weight NULL when unmatched (the stratum methods), or

    <study>_match_weights(unit_key, treated, stratum, weight)

one row per match (nearest neighbours, where a control can serve several treated units), from
which the plan builds <study>_weighted_units with each unit's summed weight. Plus a one-row
summary query named `matching_summary` (n_treated, n_treated_matched, n_control,
n_control_matched, n_strata, n_cells_dropped). Balance, effects and reports read only these
shapes, so they need no method-specific code.
"""

from __future__ import annotations

from sqlmatch.errors import SqlmatchError
from sqlmatch.matching import coarsened_exact, entropy_balancing, nearest_neighbour, score_bins, score_weighting
from sqlmatch.matching.base import MatchingMethod

METHODS: dict[str, MatchingMethod] = {m.name: m for m in (coarsened_exact.METHOD, score_bins.METHOD, nearest_neighbour.METHOD, score_weighting.METHOD, entropy_balancing.METHOD)}


def method_for(name: str) -> MatchingMethod:
    try:
        return METHODS[name]
    except KeyError:
        raise SqlmatchError(f"matching.method: unknown method {name!r}; known: {', '.join(METHODS)}.") from None


def describe() -> list[tuple[str, str]]:
    return [(m.name, m.description) for m in METHODS.values()]
