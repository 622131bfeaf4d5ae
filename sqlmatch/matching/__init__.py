"""Matching methods. Each contributes the steps that write the common weights table

    <study>_weights(unit_key, treated, stratum, weight)

(matched units only), plus a one-row summary query named `matching_summary` returning
n_treated, n_treated_matched, n_control, n_control_matched and n_strata_dropped-like counts.
Balance, effects and reports read only that shape, so they need no method-specific code.
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
