"""The sorted search of nearest neighbours on the score (controls just below and above each treated
unit in score order, sqlmatch/matching/nearest_neighbour.py) against the join of every candidate
pair it replaces, on data whose scores are heavily tied: a propensity model on one count feature
gives every rider with the same count the same score. Both routes run the same SQL after the
candidates; the brute force in numpy over every pair is the independent check.

Row-level reads of the work tables happen here, in the tests, only to check the SQL."""

from __future__ import annotations

import numpy as np
import pytest

from sqlmatch.matching import nearest_neighbour as neighbours

import duckdb

from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.plan import build_plan
from sqlmatch.runner import run_plan
from sqlmatch.spec import parse_spec

from test_neighbours import brute_force_candidates, demo_db, demo_raw, match_shares, reference_shares, run  # noqa: F401 (demo_db: a fixture)

CONFIGS = {
    "k1": {},
    "k3": {"controls_per_treated": 3},
    "k3_blocks": {"block_on": ["age_band"], "controls_per_treated": 3},
    "greedy": {"reuse_controls": False},
    "greedy_blocks": {"reuse_controls": False, "block_on": ["home_district"]},
}


def tied_raw(database: str, study: str, **matching) -> dict:
    raw = demo_raw(database, study, max_candidate_pairs=10**9, **matching)
    raw["propensity"] = {"features": ["pre_trips", "age_band"]}
    return raw


def matches_of(tables: dict, matching: dict) -> dict[tuple[int, int], float]:
    """{(treated key, control key): the control's weight in that treated unit's match}."""
    if matching.get("reuse_controls") is False:
        m = tables["pairs"]
        return {(int(a), int(b)): 1.0 for a, b in zip(m.treated_key, m.control_key)}
    return match_shares(tables["nearest_neighbour_matches"], tables["nearest_neighbour_units"])


def run_with_model(raw: dict, model, tables: tuple[str, ...]):
    """Run with a given fitted propensity model (no refit), reading the named work tables back."""
    spec = parse_spec(raw)
    database = raw["study"]["database"]
    with DuckDBEngine(database) as engine:
        out = run_plan(build_plan(spec, "duckdb", model=model), spec, engine)
    with duckdb.connect(database, read_only=True) as con:
        read = {t: con.execute(f"SELECT * FROM sqlmatch.{spec.name}_{t}").df() for t in tables}
    return spec, out, read


@pytest.fixture(scope="module")
def both_routes(demo_db):
    """Each configuration by both routes, on the scores of one propensity fit (a refit adds up in
    another order, and a last-bit change can reorder near-ties)."""
    out = {}
    model = None
    with pytest.MonkeyPatch.context() as mp:
        for route in ("sorted", "all_pairs"):
            mp.setattr(neighbours, "search_route", lambda m, route=route: route)
            for name, matching in CONFIGS.items():
                matches = "pairs" if matching.get("reuse_controls") is False else "nearest_neighbour_matches"
                raw = tied_raw(demo_db, f"nn_search_{route}_{name}", **matching)
                if model is None:
                    out[route, name] = run(raw, ("scores", "nearest_neighbour_units", matches))
                    model = out[route, name][1].model
                else:
                    out[route, name] = run_with_model(raw, model, ("scores", "nearest_neighbour_units", matches))
    return out


@pytest.mark.parametrize("name", list(CONFIGS))
def test_sorted_search_selects_the_matches_of_the_join_of_all_pairs(both_routes, name):
    spec, out_sorted, sorted_tables = both_routes["sorted", name]
    _, out_all, all_tables = both_routes["all_pairs", name]
    scores = sorted_tables["scores"].dropna(subset=["score"])
    # the data are heavily tied: several treated and control units share each score
    assert scores.score.nunique() < len(scores) / 20
    got, reference = matches_of(sorted_tables, CONFIGS[name]), matches_of(all_tables, CONFIGS[name])
    assert len(got) > 300
    assert set(got) == set(reference)
    assert [got[p] for p in reference] == pytest.approx(list(reference.values()), rel=1e-12)
    for key in ("n_treated_matched", "n_control_matched", "n_matches", "n_strata"):
        assert out_sorted.results["matching_summary"].one()[key] == out_all.results["matching_summary"].one()[key]
    if not spec.matching.reuse_controls:
        # the greedy matching over the sorted candidates is the greedy one over every pair only when no
        # treated unit ran out of candidates on a side; here none did, and the summary says so
        assert out_sorted.results["matching_summary"].one()["n_treated_cut_short"] == 0


@pytest.mark.parametrize("name", ["k1", "k3", "k3_blocks"])
def test_sorted_search_equals_brute_force_with_ties(both_routes, name):
    """With replacement: each treated unit's match set and shares are those of the brute force over
    every pair in numpy (test_neighbours.reference_shares: the k nearest, every control tied with the
    k-th sharing the slots left over). The scores here are heavily tied, so many match sets hold
    more controls than slots."""
    spec, _, tables = both_routes["sorted", name]
    t, c, width = brute_force_candidates(tables, spec)
    expected, n_split = reference_shares(t, c, width, list(spec.matching.block_on), spec.matching.controls_per_treated)
    assert n_split > 100
    got = matches_of(tables, CONFIGS[name])
    assert set(got) == set(expected)
    assert [got[p] for p in expected] == pytest.approx(list(expected.values()), rel=1e-12)
    # every treated unit's shares add up to 1
    per_treated: dict[int, float] = {}
    for (a, _), w in got.items():
        per_treated[a] = per_treated.get(a, 0.0) + w
    assert list(per_treated.values()) == pytest.approx([1.0] * len(per_treated), rel=1e-12)


def test_greedy_flags_treated_units_that_ran_out_of_candidates(demo_db):
    """Without replacement, when the controls looked at on one side of a treated unit are all taken
    by others and more lie beyond, the summary counts the unit and the run warns: a model on the
    age band alone gives each band one score, and with one control in 20 kept the treated units
    outnumber the controls in each band, so many find all 8 controls on a side taken."""
    raw = tied_raw(demo_db, "nn_search_cut", reuse_controls=False)
    raw["propensity"] = {"features": ["age_band"]}
    raw["eligibility"]["filters"].append("(pass_bought_on IS NOT NULL OR rider_id % 20 = 0)")
    spec, out, _ = run(raw)
    summary = out.results["matching_summary"].one()
    assert summary["n_treated_cut_short"] > 0
    text = " ".join(neighbours.warnings(spec, out.results))
    assert f"{summary['n_treated_cut_short']:,} enrolled units" in text and "may differ from the greedy matching" in text
