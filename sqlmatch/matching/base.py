"""What a matching method is: one object the plan, the runner and the diagnostics ask, so a new
method is one module and one line in the registry (matching/__init__.py)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Mapping


def _no_warnings(spec, results) -> list[str]:
    return []


@dataclass(frozen=True)
class MatchingMethod:
    name: str  # the value of matching.method
    description: str
    # steps(ctx, model) -> plan steps. They write <study>_weighted_units (one row per unit,
    # stratum and weight NULL when unmatched) or <study>_match_weights (one row per match), and end
    # with a one-row `matching_summary` query.
    steps: Callable
    uses_score: bool  # needs the fitted propensity model (the plan adds its steps)
    # how to keep more treated units, for the matching.min_treated refusal
    loosen: str
    # refusals run on an aggregate step's result: {step name: check(spec, result)}
    checks: Mapping[str, Callable] = field(default_factory=dict)
    # plain-words warnings from the run's aggregates: warnings(spec, results) -> [str]
    warnings: Callable = _no_warnings
    # the words reports use for what the method builds ("strata" or "matched sets")
    groups_word: str = "strata"
    # extra aggregate steps after <study>_weighted_units exists: outcome_steps(ctx, outcomes) -> [Step]
    outcome_steps: Callable | None = None
