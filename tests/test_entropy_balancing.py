"""Entropy balancing (Hainmueller 2012, Political Analysis 20:25) against computations outside
sqlmatch: the dual solved again on the rows by scipy.optimize (trust-region Newton, its own
centring and scaling), the effect's sandwich variance recomputed with numpy from the stacked
estimating equations (Zhao & Percival 2017, Journal of Causal Inference 5(1); recalled) with the
Jacobian by finite differences rather than the closed form sqlmatch uses, and the NSW data
(Dehejia & Wahba 1999, from the causaldata package)."""

from __future__ import annotations

import dataclasses
import math
import shutil
import tomllib

import numpy as np
import pytest
from scipy import optimize

from sqlmatch import api
from sqlmatch.effects import study_results
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.errors import DataError, SpecError, SqlmatchError
from sqlmatch.plan import build_plan
from sqlmatch.runner import run_plan
from sqlmatch.spec import parse_spec

from sandwich import relative_steps, sandwich_covariance
from conftest import DEMO_SPEC
from nsw import EXPERIMENTAL_INTERVAL, load_nsw, nsw_spec


def run_study(db: str, spec):
    with DuckDBEngine(db) as engine:
        out = run_plan(build_plan(spec, "duckdb"), spec, engine)
        results = study_results(spec, out.plan, out)
        rows = engine.con.execute(f"SELECT * FROM sqlmatch.{spec.name}_weighted_units ORDER BY unit_key").df()
    return out, results, rows


def term_values(rows, c) -> np.ndarray:
    """A design column of the score model's stepwise search, computed here from its definition:
    x, log(1 + max(x, 0)), a level's indicator, or a product of two such."""
    if c.kind == "product":
        return term_values(rows, c.factors[0]) * term_values(rows, c.factors[1])
    if c.kind == "level":
        return (rows[c.feature].fillna("(missing)") == c.level).to_numpy(float)
    x = rows[c.feature].to_numpy(float)
    return np.log1p(np.maximum(x, 0.0)) if c.kind == "log1p" else x


def moment_matrix(rows, spec, variances=False, fit=None) -> tuple[np.ndarray, list[str]]:
    """The moment functions from the rows, built here: numeric features, each level but the first
    (sorted) of a categorical one, and with `variances` (x - enrolled mean)^2 per numeric one;
    with stepwise terms (`fit`), also each term the search added, from its definition."""
    t = rows.treated.to_numpy() == 1
    cols, names, squares = [], [], []
    for name in spec.matching.on:
        f = spec.feature(name)
        if f.categorical:
            values = rows[name].fillna("(missing)")
            for level in sorted(values.unique())[1:]:
                cols.append((values == level).to_numpy(float))
                names.append(f"{name}={level}")
        else:
            x = rows[name].to_numpy(float)
            cols.append(x)
            names.append(name)
            if variances:
                squares.append((x - x[t].mean()) ** 2)
                names.append(f"var {name}")
    for m in fit.moments if fit is not None else ():
        if m.kind == "term":
            cols.append(term_values(rows, m.column))
            names.append(m.label)
    return np.column_stack(cols + squares), names


def scipy_weights(C: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Entropy-balancing weights of the controls, summing to the number of treated, from the dual
    min log sum exp(lam'(c - target)) solved by scipy.optimize.minimize (trust-exact)."""
    target = C[t].mean(axis=0)
    sd = C[~t].std(axis=0)
    Z = (C[~t] - target) / sd

    def parts(lam):
        eta = Z @ lam
        top = eta.max()
        e = np.exp(eta - top)
        s0 = e.sum()
        g = Z.T @ e / s0
        H = (Z * e[:, None]).T @ Z / s0 - np.outer(g, g)
        return top + math.log(s0), g, H

    res = optimize.minimize(lambda lam: parts(lam)[0], np.zeros(Z.shape[1]), jac=lambda lam: parts(lam)[1], hess=lambda lam: parts(lam)[2], method="trust-exact", options={"gtol": 1e-12, "maxiter": 500})
    # the minimiser stops where f no longer changes in floating point; polish on the gradient itself
    # (the balance conditions g(lam) = 0) with scipy.optimize.root, Jacobian H
    root = optimize.root(lambda lam: parts(lam)[1], res.x, jac=lambda lam: parts(lam)[2], method="hybr", options={"xtol": 1e-14})
    lam = root.x if np.max(np.abs(parts(root.x)[1])) < np.max(np.abs(parts(res.x)[1])) else res.x
    assert np.max(np.abs(parts(lam)[1])) < 1e-10, (res.message, root.message)
    e = np.exp(Z @ lam - (Z @ lam).max())
    return t.sum() * e / e.sum()


def numpy_sandwich(C, t, w, u, v):
    """Per unit the published equations (module docstring of sqlmatch/estimators/entropy_balancing.py:
    t (u - mu1 v), (1 - t) w (u - mu0 v), (1 - t) w (c - m), t (c - m)), with lam in the test's own
    parametrisation (w proportional to exp(lam'(c - m0))), V = J^-1 B J^-T and J by central finite
    differences of the summed equations: (estimate, SE)."""
    tf = t.astype(float)
    m0 = C[t].mean(axis=0)
    sd = C[~t].std(axis=0)
    Z = (C - m0) / sd  # lam acts on these; the sandwich does not depend on the parametrisation
    p = C.shape[1]
    # lam from the given weights: log w_j = lam'z_j + const over the controls, by least squares
    A = np.column_stack([np.ones((~t).sum()), Z[~t]])
    lam = np.linalg.lstsq(A, np.log(w[~t]), rcond=None)[0][1:]
    ref = float((Z[~t] @ lam).max())

    def psi(theta):
        mu1, mu0, lm, m = theta[0], theta[1], theta[2 : 2 + p], theta[2 + p :]
        wt = np.where(t, 0.0, np.exp(Z @ lm - ref))
        zm = Z - m
        return np.column_stack([tf * (u - mu1 * v), wt * (u - mu0 * v), wt[:, None] * zm, tf[:, None] * zm])

    wt = np.where(t, 0.0, np.exp(Z @ lam - ref))
    theta = np.concatenate([[u[t].sum() / v[t].sum(), (wt * u).sum() / (wt * v).sum()], lam, Z[t].mean(axis=0)])
    P = psi(theta)
    assert np.max(np.abs(P.sum(axis=0)[2:])) < 1e-6 * max(1.0, float(np.abs(P[:, 2:]).sum(axis=0).max()))  # balance holds
    V, _ = sandwich_covariance(psi, theta, relative_steps(theta, len(theta)))
    return theta[0] - theta[1], math.sqrt(V[0, 0] + V[1, 1] - 2 * V[0, 1])


def demo_spec(folder, terms="linear", **matching):
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(folder / "bikeshare.duckdb")
    raw["matching"] = {"method": "entropy_balancing", "on": ["pre_trips", "pre_minutes", "age_band"], **matching}
    raw["propensity"] = {"terms": terms}
    return parse_spec(raw)


@pytest.fixture(scope="module", params=[("linear", False), ("linear", True), ("stepwise", False)], ids=["means", "means_and_variances", "stepwise_terms"])
def demo_balanced(request, demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo_entropy")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    terms, variances = request.param
    spec = demo_spec(folder, terms=terms, balance_variances=variances)
    return (spec, variances, *run_study(str(folder / "bikeshare.duckdb"), spec))


def test_weights_equal_scipys_solution_of_the_dual(demo_balanced):
    """Every control's weight equals the one scipy.optimize finds for the same dual on the rows
    (to 1e-6 relative), and the stored weights balance the means (and variances) to 1e-8."""
    spec, variances, out, results, rows = demo_balanced
    t = rows.treated.to_numpy() == 1
    C, names = moment_matrix(rows, spec, variances, out.model)
    w = rows.match__weight.to_numpy(float)
    expected = scipy_weights(C, t)
    np.testing.assert_allclose(w[~t], expected, rtol=1e-6)
    assert np.all(w[t] == 1.0) and w[~t].sum() == pytest.approx(t.sum(), rel=1e-12)
    gap = np.average(C[~t], axis=0, weights=w[~t]) - C[t].mean(axis=0)
    assert np.max(np.abs(gap)) < 1e-8, dict(zip(names, gap))
    # the balance sqlmatch reports, from its stored weights
    reached = results.design["balancing"]
    assert reached["max_gap"] < 1e-8 and len(reached["moments"]) == len(names)
    assert set(reached["moments"][0]) == {"moment", "gap", "gap_sd"}  # no level share: it times n_treated is a count
    assert reached["max_weight_share"] == pytest.approx(w[~t].max() / w[~t].sum(), rel=1e-9)
    # Kish's effective number of controls, (sum w)^2 / sum w^2 (Kish 1965)
    assert results.matching.effective_controls == pytest.approx(w[~t].sum() ** 2 / np.sum(w[~t] ** 2), rel=1e-9)
    assert reached["newton_steps"] >= 1
    row = next(b for b in results.balance if b.covariate == "pre_trips")
    assert abs(row.smd_after) < 1e-9 < abs(row.smd_before)
    if variances:
        x = rows.pre_minutes.to_numpy(float)
        var_t = x[t].var()
        var_c = np.average((x[~t] - np.average(x[~t], weights=w[~t])) ** 2, weights=w[~t])
        assert var_c == pytest.approx(var_t, rel=1e-9)


@pytest.mark.parametrize("outcome", ["post_trips", "fare_per_trip", "active_last_month", "post_trips__did"])
def test_effect_and_sandwich_equal_numpys_stacked_equations(demo_balanced, outcome):
    """Means, a ratio (sum of fares / sum of trips, weighted per group), a binary outcome and the
    difference-in-differences: the effect and its sandwich SE as numpy computes them from the
    per-unit estimating equations, the Jacobian by finite differences."""
    spec, variances, out, results, rows = demo_balanced
    t = rows.treated.to_numpy() == 1
    C, _ = moment_matrix(rows, spec, variances, out.model)
    if outcome == "fare_per_trip":
        u, v = rows.fare_per_trip__num.to_numpy(float), rows.fare_per_trip__den.to_numpy(float)
    elif outcome == "post_trips__did":
        u, v = (rows.post_trips - rows.pre_trips).to_numpy(float), np.ones(len(rows))
    else:
        u, v = rows[outcome].to_numpy(float), np.ones(len(rows))
    est, se = numpy_sandwich(C, t, rows.match__weight.to_numpy(float), u, v)
    e = results.effect(outcome.split("__")[0])
    got = e.did if outcome.endswith("__did") else e
    assert got.estimate == pytest.approx(est, rel=1e-9)
    assert got.std_error == pytest.approx(se, rel=1e-5)
    assert "entropy-balancing" in e.estimator


def test_the_estimated_weights_and_targets_change_the_variance(demo_balanced):
    """The sandwich differs from the variance that takes the weights and targets as known (their
    rows and columns of J and B dropped): the estimation of both is counted."""
    from sqlmatch.estimators.entropy_balancing import MomentSums, weighted_effect
    from sqlmatch.matching.entropy_balancing import moment_count, sums_from_row

    spec, variances, out, results, rows = demo_balanced
    row = out.results["balancing_sandwich"].one()
    s, term = sums_from_row(row, "post_trips", moment_count(row))
    full = weighted_effect(s, term)
    z = np.zeros(0)
    fixed = dataclasses.replace(term, t_uz=z, t_vz=z, c_wuz=z, c_wvz=z, c_w2uz=z, c_w2vz=z)
    known = weighted_effect(MomentSums(s.n_treated, z, np.zeros((0, 0)), s.control_w, s.control_w2, z, np.zeros((0, 0)), z, np.zeros((0, 0))), fixed)
    assert known.estimate == pytest.approx(full.estimate, rel=1e-12)
    assert abs(known.std_error / full.std_error - 1) > 1e-3


@pytest.fixture(scope="module")
def nsw_db(tmp_path_factory):
    db = tmp_path_factory.mktemp("nsw_entropy") / "nsw.duckdb"
    load_nsw(str(db))
    return str(db)


def test_nsw_weights_balance_and_effect(nsw_db):
    """NSW treated men vs CPS comparison men (Dehejia & Wahba 1999), balanced on the means of their
    CPS specification's 15 terms (squares and an interaction included, so the first two moments of
    age, education and earnings): the weights equal scipy's solution of the dual, the effect and SE
    equal numpy's, and the ATT on 1978 earnings lies inside the experimental 95% interval
    [479, 3110] (Dehejia & Wahba 1999, Table 3; recalled), where the naive difference is about -8,500."""
    spec = parse_spec(nsw_spec(nsw_db, "entropy_balancing"))
    out, results, rows = run_study(nsw_db, spec)
    t = rows.treated.to_numpy() == 1
    C, _ = moment_matrix(rows, spec)
    w = rows.match__weight.to_numpy(float)
    np.testing.assert_allclose(w[~t], scipy_weights(C, t), rtol=1e-6)
    sd = C[~t].std(axis=0)
    assert np.max(np.abs(np.average(C[~t], axis=0, weights=w[~t]) - C[t].mean(axis=0)) / sd) < 1e-8
    y = rows.earnings_after.to_numpy(float)
    est, se = numpy_sandwich(C, t, w, y, np.ones(len(y)))
    effect = results.effect("earnings_after")
    assert effect.estimate == pytest.approx(est, rel=1e-9)
    assert effect.std_error == pytest.approx(se, rel=1e-5)
    low, high = EXPERIMENTAL_INTERVAL
    assert low <= effect.estimate <= high
    assert effect.naive.estimate < -8000


def _refused(db, spec):
    with DuckDBEngine(db) as engine:
        with pytest.raises(SqlmatchError) as err:
            run_plan(build_plan(spec, "duckdb"), spec, engine)
        left = [t for t in engine.table_names("sqlmatch") if t.startswith(spec.name + "_")]
    assert not left, left  # nothing half written
    return err.value


def test_a_target_outside_the_controls_range_is_refused(tmp_path):
    """Every treated man older than every comparison man: no weights reach their mean age."""
    import duckdb

    db = str(tmp_path / "nsw.duckdb")
    load_nsw(db)
    with duckdb.connect(db) as con:
        con.execute("UPDATE men SET age = age + 100 WHERE enrolled_on IS NOT NULL")
    err = _refused(db, parse_spec(nsw_spec(db, "entropy_balancing", on=["age", "educ"])))
    assert isinstance(err, DataError) and err.key == "matching.on"
    assert "age" in str(err) and "outside the range" in str(err)


def test_targets_outside_the_convex_hull_are_refused(tmp_path):
    """Each mean within the controls' range, jointly unreachable: the comparison men sit at three
    points (age, education) = (18, 8), (40, 18), (40, 8), and every treated man at (20, 16),
    above the triangle's edge from (18, 8) to (40, 18). The Newton steps run off; the refusal
    names matching.on and the features."""
    import duckdb

    db = str(tmp_path / "nsw.duckdb")
    load_nsw(db)
    with duckdb.connect(db) as con:
        con.execute("UPDATE men SET age = 20, educ = 16 WHERE enrolled_on IS NOT NULL")
        con.execute(
            "UPDATE men SET age = CASE WHEN person_id % 3 = 0 THEN 18 ELSE 40 END, "
            "educ = CASE WHEN person_id % 3 = 1 THEN 18 ELSE 8 END WHERE enrolled_on IS NULL"
        )
    err = _refused(db, parse_spec(nsw_spec(db, "entropy_balancing", on=["age", "educ"], balancing_max_steps=30)))
    assert isinstance(err, DataError) and err.key == "matching.on"
    assert "did not reach balance" in str(err) and ("age" in str(err) or "educ" in str(err))


def test_collinear_features_are_refused(tmp_path):
    """A feature that is another one doubled: the moments are collinear, the dual's Hessian
    singular; refused naming both."""
    import duckdb

    db = str(tmp_path / "nsw.duckdb")
    load_nsw(db)
    with duckdb.connect(db) as con:
        con.execute("ALTER TABLE men ADD COLUMN age_twice DOUBLE")
        con.execute("UPDATE men SET age_twice = 2 * age")
    raw = nsw_spec(db, "entropy_balancing", on=["age", "educ", "age_twice"])
    raw["features"].append({"name": "age_twice", "aggregate": "attribute", "attribute": "age_twice"})
    err = _refused(db, parse_spec(raw))
    assert err.key == "matching.on" and "collinear" in str(err) and "age_twice" in str(err) and "age," in str(err)


def test_the_variance_of_a_two_valued_feature_is_left_out(nsw_db):
    """(x - a)^2 of a 0/1 feature is linear in x, so balancing its mean balances its variance; the
    moment would make the dual singular and is left out, and the design says so."""
    spec = parse_spec(nsw_spec(nsw_db, "entropy_balancing", on=["age", "black", "re75"], balance_variances=True))
    out, results, rows = run_study(nsw_db, spec)
    labels = [m.label for m in out.model.moments]
    assert labels == ["age", "black", "re75", "the variance of age", "the variance of re75"]
    assert results.design["balancing"]["left_out"] == ["the variance of black (two values only: its mean fixes it)"]
    t = rows.treated.to_numpy() == 1
    w = rows.match__weight.to_numpy(float)
    for name in ("age", "black", "re75"):
        x = rows[name].to_numpy(float)
        mean_c = np.average(x[~t], weights=w[~t])
        assert mean_c == pytest.approx(x[t].mean(), rel=1e-9)
        assert np.average((x[~t] - mean_c) ** 2, weights=w[~t]) == pytest.approx(x[t].var(), rel=1e-8)


@pytest.mark.parametrize("key, value", [("balance_variances", "yes"), ("balancing_max_steps", 0), ("balancing_max_steps", 2.5)])
def test_bad_options_name_their_key(nsw_db, key, value):
    with pytest.raises(SpecError) as err:
        parse_spec(nsw_spec(nsw_db, "entropy_balancing", **{key: value}))
    assert err.value.key == f"matching.{key}"


def test_what_it_does_not_support_is_refused_before_any_table(tmp_path):
    nsw_db = str(tmp_path / "nsw.duckdb")
    load_nsw(nsw_db)
    raw = nsw_spec(nsw_db, "entropy_balancing")
    raw["effect"] = {"regression_adjustment": True}
    err = _refused(nsw_db, parse_spec(raw))
    assert err.key == "effect.regression_adjustment"
    with pytest.raises(SqlmatchError, match="scheduler"):
        api.compile_for_scheduler(parse_spec(nsw_spec(nsw_db, "entropy_balancing")))


def test_rows_fetched_do_not_grow_with_the_units(nsw_db, tmp_path):
    """The same study on the NSW data and with every comparison man present three times (new keys):
    every aggregate step returns as many rows, and each Newton step one row."""
    import duckdb

    def step_rows(db):
        spec = parse_spec(nsw_spec(db, "entropy_balancing", on=["age", "educ", "black", "re74", "re75"]))
        with DuckDBEngine(db) as engine:
            out = run_plan(build_plan(spec, "duckdb"), spec, engine)
        return out, {name: len(r.rows) for name, r in out.results.items()}, out.rows_fetched - 1 - out.model.evaluations

    small, small_rows, small_rest = step_rows(nsw_db)
    big_db = tmp_path / "nsw3.duckdb"
    load_nsw(str(big_db))
    with duckdb.connect(str(big_db)) as con:
        for k in (1, 2):
            con.execute(f"INSERT INTO earnings SELECT e.person_id + {k} * 1000000, e.paid_on, e.earnings FROM earnings e JOIN men m USING (person_id) WHERE m.enrolled_on IS NULL AND m.person_id < 1000000")
            con.execute(f"INSERT INTO men SELECT * REPLACE (person_id + {k} * 1000000 AS person_id) FROM men WHERE enrolled_on IS NULL AND person_id < 1000000")
    big, big_rows, big_rest = step_rows(str(big_db))
    assert int(big.results["matching_summary"].one()["n_control"]) > 2 * int(small.results["matching_summary"].one()["n_control"])
    assert big_rows == small_rows and small_rows["balancing_sandwich"] == 1
    assert big_rest == small_rest  # besides the targets row and one row per evaluation of the dual


def test_newton_reaches_balance_when_the_dual_stops_changing_in_floating_point():
    """Near the optimum a step lowers f less than the rounding of a sum over many units: the
    solver then takes steps that shrink the gradient (here each query's f is 1e-13 higher than
    the one before, as a warehouse's sum may differ in its last digits), so balance reaches the
    tolerance instead of stalling near 1e-8. The exact dual is computed with numpy on made-up moments (4,000 controls, 3 moments)."""
    from sqlmatch.estimators.entropy_balancing import DualValue, solve

    rng = np.random.default_rng(7)
    Z = rng.normal(size=(4000, 3)) @ np.array([[1.0, 0.9, 0.0], [0.0, 0.4, 0.3], [0.0, 0.0, 1.0]]) + np.array([-0.3, 0.2, 0.1])

    calls = []

    def evaluate(lam):
        eta = Z @ lam
        e = np.exp(eta - eta.max())
        s0 = e.sum()
        g = Z.T @ e / s0
        h = (Z * e[:, None]).T @ Z / s0 - np.outer(g, g)
        calls.append(1)
        noise = 1e-13 * len(calls)  # each query's f a little higher: rounding that differs from query to query
        return DualValue(float(eta.max() + math.log(s0)) + noise, g, h, 1 / s0, s0**2 / np.sum(e**2))

    sol = solve(evaluate, 3, max_steps=50, tolerance=1e-12)
    assert np.max(np.abs(sol.dual.gradient)) <= 1e-12 and sol.steps < 15


def test_postgres_gives_duckdbs_numbers(nsw_db):
    """The fit's queries (targets, Newton steps) and the weights, summary and sandwich mean the
    same on PostgreSQL: every number of results.json equal (test_engines' tolerances), the balance
    gaps (about 1e-12, rounding) compared in absolute terms."""
    import os
    import secrets

    import duckdb

    url = os.environ.get("SQLMATCH_TEST_POSTGRES_URL")
    if not url:
        pytest.skip("SQLMATCH_TEST_POSTGRES_URL is not set: no PostgreSQL server to run on")
    from sqlmatch.engines.postgres import PostgresEngine
    from test_engines import PG_TYPES, assert_same_numbers

    def spec_for(schema, work):
        raw = nsw_spec(":memory:", "entropy_balancing", on=["age", "educ", "black", "hisp", "marr", "re74", "re75"], balance_variances=True)
        raw["study"].update(work_schema=work)
        raw["units"]["table"] = {"schema": schema, "name": "men"}
        raw["events"]["table"] = {"schema": schema, "name": "earnings"}
        raw["subgroups"] = [{"name": "earned_1975", "where": "re75 > 0"}]  # the per-level sandwich query too
        return parse_spec(raw)

    def gaps(d):
        b = d["design"]["balancing"]
        b.pop("max_gap")
        for m in b["moments"]:
            m.pop("gap")
        b.pop("max_gap_sd")
        return [m.pop("gap_sd") for m in b["moments"]]

    with DuckDBEngine(nsw_db) as engine:
        want = api.run(spec_for("main", "sqlmatch_pg_reference"), engine=engine, keep_tables=False).to_dict()
    tag = f"sqlmatch_entropy_{os.getpid()}_{secrets.token_hex(3)}"
    engine = PostgresEngine(url)
    try:
        engine.execute(f'CREATE SCHEMA "{tag}"')
        con = duckdb.connect(nsw_db, read_only=True)
        for name in ("men", "earnings"):
            cols = [(r[0], r[1]) for r in con.execute(f"DESCRIBE {name}").fetchall()]
            engine.execute(f'CREATE TABLE "{tag}"."{name}" (' + ", ".join(f'"{c}" {PG_TYPES[t]}' for c, t in cols) + ")")
            with engine.con.cursor() as cur:
                with cur.copy(f'COPY "{tag}"."{name}" FROM STDIN') as copy:
                    for row in con.execute(f"SELECT * FROM {name}").fetchall():
                        copy.write_row(row)
        con.close()
        got = api.run(spec_for(tag, f"{tag}_work"), engine=engine, keep_tables=False).to_dict()
    finally:
        for s in (tag, f"{tag}_work"):
            engine.execute(f'DROP SCHEMA IF EXISTS "{s}" CASCADE')
        engine.close()
    assert got.pop("dialect") == "postgres" and want.pop("dialect") == "duckdb"
    got.pop("provenance"), want.pop("provenance")
    assert max(abs(x) for x in gaps(got) + gaps(want)) < 1e-9  # in SDs of the controls' values
    assert got["effects"][0]["estimator"].startswith("entropy-balancing")
    assert len(got["subgroups"]) == 1 and got["subgroups"][0]["heterogeneity"]["p_value"] is not None
    assert_same_numbers(got, want)


def test_reports_speak_of_weighted_controls(demo_balanced):
    """Both reports say what the weights did: a weighted comparison (no strata), the balance
    reached, Kish's effective number of controls and the largest weight's share."""
    from sqlmatch.report.html import render_html
    from sqlmatch.report.markdown import render_markdown

    spec, variances, out, results, rows = demo_balanced
    ess = f"about {results.matching.effective_controls:,.0f} unweighted ones"
    for text in (render_markdown(results), render_html(results)):
        assert "Strata used" not in text and "entropy balancing; one group, no strata" in text
        assert ess in text and "Kish" in text and "largest weight is" in text
        assert "Balance reached" in text and f"{results.design['balancing']['newton_steps']} Newton steps" in text
    assert "weighted comparison mean" in render_markdown(results)


@pytest.mark.parametrize("scheduler", [False, True], ids=["direct", "for_scheduler"])
def test_compile_says_the_method_runs_with_sqlmatch_run(tmp_path, capsys, scheduler):
    """The compiled plan would stop before the Newton steps: one line naming matching.method and
    `sqlmatch run` (it spoke of a propensity model file before), nothing written."""
    from sqlmatch.cli import main

    spec = tmp_path / "annual_pass.toml"
    spec.write_text(DEMO_SPEC.read_text().replace('method = "coarsened_exact"', 'method = "entropy_balancing"'))
    sql = tmp_path / "sql"
    assert main(["compile", str(spec), "--out", str(sql)] + (["--for-scheduler"] if scheduler else [])) == 2
    err = capsys.readouterr().err
    assert len(err.splitlines()) == 1 and "matching.method" in err and "sqlmatch run" in err and "model.json" not in err
    assert not sql.exists()


def test_stepwise_terms_are_the_score_models_and_are_balanced(demo_balanced, demo_dir, tmp_path):
    """With `[propensity] terms = "stepwise"` the balanced moments are matching.on's plus exactly
    the terms the propensity model's stepwise search adds for score_weighting on the same data
    (Imbens & Rubin 2015, 13.3), and the weights reach their enrolled means (to 1e-8, numpy)."""
    spec, variances, out, results, rows = demo_balanced
    if spec.propensity.terms != "stepwise":
        pytest.skip("the linear fixtures balance matching.on only")
    terms = [m for m in out.model.moments if m.kind == "term"]
    assert terms, "the search added no term on the demo data"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(tmp_path / "bikeshare.duckdb")
    raw["matching"] = {"method": "score_weighting", "on": list(spec.matching.on)}
    weighting = parse_spec(raw)
    with DuckDBEngine(str(tmp_path / "bikeshare.duckdb")) as engine:
        model = run_plan(build_plan(weighting, "duckdb"), weighting, engine).model
    added = [c for c in model.columns if c.kind in ("log1p", "product")]
    assert [m.column for m in terms] == added
    assert [t["term"] for t in out.model.added_terms] == [c["term"] for c in model.selection]
    t = rows.treated.to_numpy() == 1
    w = rows.match__weight.to_numpy(float)
    for m in terms:
        x = term_values(rows, m.column)
        assert abs(np.average(x[~t], weights=w[~t]) - x[t].mean()) < 1e-8 * max(1.0, x.std()), m.label
    words = results.design["balancing"]
    assert words["terms"] == "stepwise" and [a["term"] for a in words["added_terms"]] == [m.label for m in terms]


def test_an_added_term_out_of_reach_is_left_out_but_a_feature_is_refused():
    """A term the stepwise search added whose enrolled mean lies outside the non-enrolled units'
    range is left out (and named); a matching.on feature in that state is refused."""
    from sqlmatch import columns as col
    from sqlmatch.matching.entropy_balancing import Moment, standardised
    from sqlmatch.propensity import DesignColumn

    x = DesignColumn(name="pre_trips", kind="numeric", feature="pre_trips")
    term = Moment("pre_trips", "term", column=DesignColumn(name="pre_trips__sq", kind="product", factors=(x, x)))
    moments = [Moment("pre_trips", "numeric"), term]
    row = {col.balancing("n_treated"): 10, col.balancing("n_control"): 20}
    values = {  # moment 0 reachable (treated mean 5 inside [0, 10]); moment 1's treated mean 120 above the controls' 100
        0: dict(present=30, t_sum=50, t_sumsq=300, c_sum=100, c_sumsq=700, c_min=0, c_max=10, t_min=1, t_max=9),
        1: dict(present=30, t_sum=1200, t_sumsq=150000, c_sum=700, c_sumsq=40000, c_min=0, c_max=100, t_min=100, t_max=144),
    }
    for k, v in values.items():
        row.update({col.balancing(what, k): value for what, value in v.items()})
    spec = type("S", (), {"matching": type("M", (), {"balance_variances": False})()})()
    kept, left_out, n_t, n_c = standardised(spec, moments, row)
    assert [m.kind for m in kept] == ["numeric"] and (n_t, n_c) == (10, 20)
    assert len(left_out) == 1 and "(pre_trips)^2" in left_out[0] and "stepwise" in left_out[0]
    row[col.balancing("t_sum", 0)] = 150  # the feature's own mean, 15, above the controls' maximum 10
    with pytest.raises(DataError) as err:
        standardised(spec, moments, row)
    assert err.value.key == "matching.on"


def test_a_scheduled_plan_applies_the_fit_stored_beside_the_spec(demo_dir, tmp_path):
    """`sqlmatch run` stores the fit beside the spec (<spec>.balancing.json); the plan compiled for a
    scheduler bakes it into its SQL and, run file by file with no sqlmatch around it, `sqlmatch
    report` gives the run's effects and SEs (same data, same weights, so to 1e-9). On data that
    changed since, the stored weights no longer balance the means, and the report says so."""
    import duckdb

    from test_scheduler_files import compiled, run_duckdb

    db = tmp_path / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", db)
    spec_file = tmp_path / "annual_pass.toml"
    spec_file.write_text(DEMO_SPEC.read_text().replace('method = "coarsened_exact"', 'method = "entropy_balancing"').replace('database = "bikeshare.duckdb"', f'database = "{db}"'))
    spec = api.load(str(spec_file))
    with pytest.raises(SqlmatchError, match="balancing.json"):
        api.compile_for_scheduler(spec)
    direct = api.run(spec, keep_tables=False)
    stored = tmp_path / "annual_pass.balancing.json"
    assert stored.is_file()
    files = compiled(spec, "duckdb", tmp_path / "sql")
    run_duckdb(db, files)
    scheduled = api.report_from_tables(spec)
    for name in ("post_trips", "fare_per_trip", "active_last_month"):
        assert scheduled.effect(name).estimate == pytest.approx(direct.effect(name).estimate, rel=1e-9)
        assert scheduled.effect(name).std_error == pytest.approx(direct.effect(name).std_error, rel=1e-9)
    assert scheduled.design["balancing"]["max_gap_sd"] < 1e-8
    assert not any("no longer balance" in w for w in scheduled.warnings)
    # a fifth of the comparison riders lose their trips: the stored weights meet other units
    with duckdb.connect(str(db)) as con:
        con.execute("DELETE FROM trips WHERE rider_id % 5 = 0 AND rider_id IN (SELECT rider_id FROM riders WHERE pass_bought_on IS NULL)")
    run_duckdb(db, files)
    stale = api.report_from_tables(spec)
    (warning,) = [w for w in stale.warnings if "no longer balance" in w]
    assert "annual_pass.balancing.json" in warning and "sqlmatch run" in warning
    assert stale.design["balancing"]["max_gap_sd"] > 1e-3
