"""What a matching method is: one object the plan, the runner and the diagnostics ask, so a new
method is one module and one line in the registry (matching/__init__.py)."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable, Mapping


def _no_warnings(spec, results) -> list[str]:
    return []


def _no_options(table: dict, given: "OptionInput") -> dict:
    return {}


@dataclass(frozen=True)
class OptionInput:
    """What a method's option reader may consult besides the [matching] table."""

    features: tuple  # spec.Feature, in spec order
    on: tuple[str, ...]  # matching.on, missing-value indicators included
    chosen: bool  # this method is matching.method (checks that only matter for the chosen one)


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
    # the [matching] keys this method owns, and their reader: read_options(table, OptionInput) ->
    # {spec.Matching field: value}. Every method's reader runs on every spec, so a spec can carry
    # the options of several methods and switch with --method; a typo is refused either way.
    option_keys: tuple[str, ...] = ()
    read_options: Callable = _no_options
    # keys of earlier versions -> the key to use now; refused with the new name
    renamed_options: Mapping[str, str] = field(default_factory=dict)
    # refusals run on an aggregate step's result: {step name: check(spec, result)}
    checks: Mapping[str, Callable] = field(default_factory=dict)
    # plain-words warnings from the run's aggregates: warnings(spec, results) -> [str]
    warnings: Callable = _no_warnings
    # the words reports use for what the method builds ("strata" or "matched sets")
    groups_word: str = "strata"
    # extra aggregate steps after <study>_weighted_units exists: outcome_steps(ctx, outcomes) -> [Step]
    outcome_steps: Callable | None = None
    # every unit of a group weighs the same within a stratum (true of strata and of matched sets
    # listed once per match), so the outcome_strata sums are the weighted ones and the
    # within-stratum regression adjustment (estimators/adjusted.py) applies
    adjustable: bool = True
    # the effects it can estimate (spec key matching.estimand): strata can be weighted to any group
    estimands: tuple[str, ...] = ("att",)
    # a method fitted in the warehouse before its steps (not the propensity model): the plan stops
    # after the source steps and fit_steps(ctx, fitted); the runner calls fit(spec, engine, out,
    # progress) -> fitted and builds the full plan with it (entropy balancing's Newton steps)
    fit: Callable | None = None
    fit_steps: Callable | None = None
    # where a scheduled plan finds that fit: save_fit(spec, fitted) writes it beside the spec after a
    # run, load_fit(spec) -> fitted or None (as the propensity model's <spec>.model.json)
    save_fit: Callable | None = None
    load_fit: Callable | None = None
    # for a method that writes <study>_match_weights: one_weight_row_per_unit(spec) -> True when that
    # table holds at most one row per unit, so the weighted_units step joins it as it is instead of
    # summing it per unit first (the same weights, one hash aggregate over the matches fewer)
    one_weight_row_per_unit: Callable | None = None
