"""Each matching method owns its [matching] options: read and checked in its own module, listed
in its MatchingMethod, and nowhere else (the registry decides what spec.py accepts)."""

from __future__ import annotations

import dataclasses
import re
import tomllib
from pathlib import Path

import pytest

from sqlmatch import matching
from sqlmatch.errors import SpecError
from sqlmatch.spec import Matching, parse_spec

from conftest import DEMO_SPEC

COMMON = {"method", "on", "exact", "common_support", "min_treated", "estimand"}
ROOT = Path(__file__).resolve().parents[1]


def demo(**matching_keys) -> dict:
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["matching"] = {**raw["matching"], **matching_keys}
    return raw


def test_every_option_has_one_owner_and_one_field():
    owners: dict[str, str] = {}
    for m in matching.METHODS.values():
        for key in m.option_keys:
            assert key not in COMMON, f"{m.name} claims the common key {key}"
            assert key not in owners, f"{key} is claimed by {owners[key]} and {m.name}"
            owners[key] = m.name
    fields = {f.name for f in dataclasses.fields(Matching)}
    assert set(owners) | COMMON == fields


def test_spec_module_names_no_method_option():
    # spec.py reads only the common keys; a method's key written there would be a second home
    text = (ROOT / "sqlmatch" / "spec.py").read_text()
    body = text[text.index("def _matching("):text.index("def _with_indicators")]
    for m in matching.METHODS.values():
        for key in m.option_keys:
            assert not re.search(rf'"{key}"', body), f"spec._matching reads {m.name}'s option {key}"


@pytest.mark.parametrize(
    "key, value, owner",
    [
        ("caliper", -1, "nearest_neighbour"),
        ("ratio", 0, "nearest_neighbour"),
        ("distance", "euclid", "nearest_neighbour"),
        ("bins", 3, "score_bins"),
        ("coarsen", "deciles", "coarsened_exact"),
        ("coarsen_bins", 1, "coarsened_exact"),
    ],
)
def test_an_option_of_another_method_is_still_checked(key, value, owner):
    # the demo uses coarsened_exact: a bad nearest-neighbour option is refused anyway, so a spec
    # switched with --method never meets a bad value late
    assert owner in matching.METHODS
    with pytest.raises(SpecError) as err:
        parse_spec(demo(**{key: value}))
    assert err.value.key == f"matching.{key}"


def test_options_of_several_methods_live_in_one_spec():
    spec = parse_spec(demo(caliper=0.1, bins=8, ratio=2))
    assert (spec.matching.method, spec.matching.caliper, spec.matching.bins, spec.matching.ratio) == ("coarsened_exact", 0.1, 8, 2)
    switched = spec.with_overrides(method="nearest_neighbour")
    assert (switched.matching.method, switched.matching.caliper, switched.matching.ratio) == ("nearest_neighbour", 0.1, 2)


def test_a_check_only_for_the_chosen_method():
    # numeric features without cut points matter to coarsened_exact only
    raw = demo()
    raw["matching"].pop("cut_points", None)
    raw["matching"].pop("coarsen", None)
    with pytest.raises(SpecError) as err:
        parse_spec(raw)
    assert err.value.key.startswith("matching.cut_points.")
    raw["matching"]["method"] = "score_bins"
    assert parse_spec(raw).matching.method == "score_bins"


def test_unknown_key_names_every_known_one():
    with pytest.raises(SpecError) as err:
        parse_spec(demo(calliper=0.2))
    assert err.value.key == "matching.calliper"
    for key in COMMON | {"caliper", "bins", "cut_points"}:
        assert key in str(err.value)
