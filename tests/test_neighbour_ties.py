"""Nearest neighbours with replacement when controls tie in distance: every control at the last
distance taken shares the slots left over (the match set J_M(i) of Abadie & Imbens 2006 includes
all ties), so the answer never hinges on a key, a hash or the order rows were written in. Data with
exact ties: a propensity model on pre_trips and age_band alone gives every rider with the same
count and band the same score.

Checked against independent numpy computations on the rows: the shares (test_neighbours.
reference_shares), the matching estimator, the Abadie & Imbens (2006) variance with the K_M(i)
built from those shares (test_matching_variance.numpy_variance) and the Abadie & Imbens (2011)
bias-corrected estimator with statsmodels WLS; and against the same study on the same riders
with their keys relabelled and rows inserted in another order.

Without replacement (greedy 1:1 pairs) a control serves one treated unit, so a tie cannot be shared:
the tie goes to the control nearer in the block's score order, then the lower key. The pairs then
do not depend on the order rows were inserted in (checked here), but they may depend on the keys.

Row-level reads of the work tables happen here, in the tests, only to check the SQL."""

from __future__ import annotations

import shutil

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sqlmatch.effects import study_results
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.plan import build_plan
from sqlmatch.runner import run_plan
from sqlmatch.spec import parse_spec

from test_matching_variance import numpy_variance
from test_neighbours import brute_force_candidates, demo_raw, match_shares, reference_shares

CONFIGS = {"k1": {}, "k3": {"controls_per_treated": 3}, "greedy": {"reuse_controls": False}}
OUTCOMES = ("post_trips", "post_minutes", "active_last_month", "fare_per_trip")
RELABEL = 7919  # new key = (key * 7919) % 1000003: a one-to-one map of the demo's keys (1000003 is prime)


def tied_raw(database: str, study: str, **matching) -> dict:
    raw = demo_raw(database, study, **matching)
    raw["propensity"] = {"features": ["pre_trips", "age_band"]}
    return raw


def reordered_copy(source: str, target: str, relabel: bool) -> None:
    """The same riders and trips with both tables written in another row order and, with relabel,
    every rider key mapped one-to-one to another."""
    shutil.copyfile(source, target)
    key = f"REPLACE ((rider_id * {RELABEL}) % 1000003 AS rider_id)" if relabel else ""
    with duckdb.connect(target) as con:
        for table in ("riders", "trips"):
            con.execute(f"CREATE TABLE {table}_new AS SELECT * {key} FROM {table} ORDER BY (rider_id * 2654435761) % 4294967296 DESC")
            con.execute(f"DROP TABLE {table}")
            con.execute(f"ALTER TABLE {table}_new RENAME TO {table}")


def run_study(raw: dict, model=None):
    """The study run on one propensity model (a refit could move scores in their last bits), its
    results and work tables."""
    spec = parse_spec(raw)
    database = raw["study"]["database"]
    with DuckDBEngine(database) as engine:
        output = run_plan(build_plan(spec, "duckdb", model=model), spec, engine)
    results = study_results(spec, output.plan, output)
    names = ["scores", "measures", "match_weights", "nearest_neighbour_units"]
    names.append("pairs" if raw["matching"].get("reuse_controls") is False else "nearest_neighbour_matches")
    with duckdb.connect(database, read_only=True) as con:
        tables = {t: con.execute(f"SELECT * FROM sqlmatch.{spec.name}_{t}").df() for t in names}
    return spec, output, results, tables


@pytest.fixture(scope="module")
def runs(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("neighbour_ties")
    original = str(folder / "original.duckdb")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", original)
    copies = {"reordered": str(folder / "reordered.duckdb"), "relabelled": str(folder / "relabelled.duckdb")}
    for kind, path in copies.items():
        reordered_copy(original, path, relabel=kind == "relabelled")
    out, model = {}, None
    for name, matching in CONFIGS.items():
        spec, output, results, tables = run_study(tied_raw(original, f"ties_{name}", **matching), model)
        model = model or output.model
        out[name] = (spec, results, tables)
        for kind, path in copies.items():
            if name != "greedy" or kind == "reordered":
                spec_r, _, results_r, tables_r = run_study(tied_raw(path, f"ties_{name}", **matching), model)
                out[name, kind] = (spec_r, results_r, tables_r)
    return out


def shares_of(tables) -> dict[tuple[int, int], float]:
    return match_shares(tables["nearest_neighbour_matches"], tables["nearest_neighbour_units"])


def reference_weights(shares: dict[tuple[int, int], float]) -> pd.DataFrame:
    """match_weights rows from the numpy shares: treated 1, a control the sum of its shares."""
    w: dict[tuple[int, int], float] = {}
    for (a, b), s in shares.items():
        w[a, 1] = 1.0
        w[b, 0] = w.get((b, 0), 0.0) + s
    return pd.DataFrame([(k, g, v) for (k, g), v in w.items()], columns=["unit_key", "treated", "weight"])


@pytest.mark.parametrize("name", ["k1", "k3"])
def test_tied_controls_share_the_last_slots(runs, name):
    spec, _, tables = runs[name]
    t, c, width = brute_force_candidates(tables, spec)
    expected, n_split = reference_shares(t, c, width, [], spec.matching.controls_per_treated)
    assert n_split > 100  # most treated units have more controls at their last distance than slots left
    got = shares_of(tables)
    assert set(got) == set(expected)
    assert [got[p] for p in expected] == pytest.approx(list(expected.values()), rel=1e-12)


@pytest.mark.parametrize("name", ["k1", "k3"])
def test_estimate_and_abadie_imbens_variance_follow_the_shares(runs, name):
    """With the numpy shares: the bias-corrected matching estimator (Abadie & Imbens 2011, per
    treated unit: Y_i - sum_j s_ij Y_j - (mu0(X_i) - sum_j s_ij mu0(X_j)), mu0 the matched controls'
    WLS regression weighted by K_M(i) / M) and the Abadie & Imbens (2006) population standard error with
    those shares (numpy_variance: each treated unit's matched mean and the controls' squared shares),
    against sqlmatch's reported estimate and standard error."""
    spec, results, tables = runs[name]
    t, c, width = brute_force_candidates(tables, spec)
    shares, _ = reference_shares(t, c, width, [], spec.matching.controls_per_treated)
    weights = reference_weights(shares)
    x = tables["measures"].set_index("unit_key")
    features = [f.name for f in spec.numeric_features]
    controls = weights[weights.treated == 0]
    m = pd.DataFrame([(a, b, s) for (a, b), s in shares.items()], columns=["treated_key", "control_key", "share"])
    for outcome in ("post_trips", "active_last_month"):
        y = x[outcome].astype(float)
        fit = sm.WLS(y.loc[controls.unit_key].to_numpy(), sm.add_constant(x.loc[controls.unit_key, features].to_numpy(float)), weights=controls.weight.to_numpy()).fit()
        mu0 = pd.Series(fit.predict(sm.add_constant(x[features].to_numpy(float))), index=x.index)
        per = m.assign(yc=y.loc[m.control_key].to_numpy() * m.share, muc=mu0.loc[m.control_key].to_numpy() * m.share).groupby("treated_key")[["yc", "muc"]].sum()
        expected = float(np.mean((y.loc[per.index].to_numpy() - per.yc.to_numpy()) - (mu0.loc[per.index].to_numpy() - per.muc.to_numpy())))
        effect = results.effect(outcome)
        assert effect.estimate == pytest.approx(expected, rel=1e-9, abs=1e-12)
        variance = numpy_variance(spec, {"match_weights": weights, "scores": tables["scores"], "measures": tables["measures"], "matches": m}, lambda u, w, o=outcome: u[o].to_numpy(dtype=float))
        assert effect.std_error == pytest.approx(np.sqrt(variance), rel=1e-9)


@pytest.mark.parametrize("name", ["k1", "k3"])
def test_answer_does_not_depend_on_row_order(runs, name):
    """The same riders with rows inserted in another order: the same match weights, estimates and
    standard errors."""
    _, results, tables = runs[name]
    _, results_r, tables_r = runs[name, "reordered"]
    got, want = shares_of(tables_r), shares_of(tables)
    assert set(got) == set(want)
    assert [got[p] for p in want] == pytest.approx(list(want.values()), rel=1e-12)
    for outcome in OUTCOMES:
        a, b = results.effect(outcome), results_r.effect(outcome)
        assert b.estimate == pytest.approx(a.estimate, rel=1e-9, abs=1e-12)
        assert b.std_error == pytest.approx(a.std_error, rel=1e-9)


@pytest.mark.parametrize("name", ["k1", "k3"])
def test_matches_and_estimates_do_not_depend_on_the_keys(runs, name):
    """The same riders with their keys relabelled (and rows in another order) give the same match
    weights (mapped back) and the same estimates, bias-corrected ones included: no tiebreak by key
    decides which tied control counts. (The standard error's conditional variance still takes, among
    same-group units tied in score, the one before in key order as the unit's neighbour, so it may
    move with the keys.)"""
    _, results, tables = runs[name]
    _, results_r, tables_r = runs[name, "relabelled"]
    inverse = {(k * RELABEL) % 1000003: k for k in tables["measures"].unit_key.astype(int)}
    got = {(inverse[a], inverse[b]): s for (a, b), s in shares_of(tables_r).items()}
    want = shares_of(tables)
    assert set(got) == set(want)
    assert [got[p] for p in want] == pytest.approx(list(want.values()), rel=1e-12)
    for outcome in OUTCOMES:
        assert results_r.effect(outcome).estimate == pytest.approx(results.effect(outcome).estimate, rel=1e-9, abs=1e-12)


def test_greedy_pairs_are_the_same_for_rows_in_another_order(runs):
    """Without replacement each control serves one treated unit, so a tie cannot be shared: it goes
    to the control nearer in the block's score order, then the lower key. Inserting the rows in
    another order changes no pair (with relabelled keys, another of the tied controls may be taken)."""
    _, _, tables = runs["greedy"]
    _, _, shuffled = runs["greedy", "reordered"]
    a = set(zip(tables["pairs"].treated_key.astype(int), tables["pairs"].control_key.astype(int)))
    b = set(zip(shuffled["pairs"].treated_key.astype(int), shuffled["pairs"].control_key.astype(int)))
    assert a == b and len(a) > 300
