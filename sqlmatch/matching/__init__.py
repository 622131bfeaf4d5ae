"""Matching methods. Each contributes the steps that write one of two common shapes:

    <study>_weighted(unit_key, treated, <every feature and outcome>, match__stratum, match__weight)

one row per unit in the study, stratum and weight NULL when unmatched (the stratum methods), or

    <study>_weights(unit_key, treated, stratum, weight)

one row per match (nearest neighbours, where a control can serve several treated units), from
which the plan builds <study>_weighted with each unit's summed weight. Plus a one-row summary
query named `matching_summary` returning n_treated, n_treated_matched, n_control,
n_control_matched and n_strata_dropped-like counts. Balance, effects and reports read only these
shapes, so they need no method-specific code.
"""

from __future__ import annotations

from sqlmatch.errors import SqlmatchError
from sqlmatch.matching import coarsened, neighbours, score_bins

METHODS = {
    "coarsened_exact": coarsened,
    "score_bins": score_bins,
    "nearest": neighbours,
}


def method_for(name: str):
    try:
        return METHODS[name]
    except KeyError:
        raise SqlmatchError(f"matching.method: unknown method {name!r}; known: {', '.join(METHODS)}.") from None


def describe() -> list[tuple[str, str]]:
    return [(name, module.DESCRIPTION) for name, module in METHODS.items()]
