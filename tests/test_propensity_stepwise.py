"""Stepwise choice of the propensity model's terms (Imbens & Rubin 2015, Causal Inference for
Statistics, Social, and Biomedical Sciences, section 13.3), checked against statsmodels and numpy."""

from __future__ import annotations

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.errors import SpecError
from sqlmatch.plan import build_plan
from sqlmatch.propensity import FittedModel, first_order_candidates, second_order_candidates
from sqlmatch.runner import run_plan
from sqlmatch.spec import parse_spec

from nsw import load_nsw, nsw_spec

pytest.importorskip("causaldata")

BASE = ["age", "educ", "black", "hisp", "marr", "nodegree", "re74", "re75"]


def values(col, rows: pd.DataFrame) -> np.ndarray:
    """A design column computed with numpy on the rows (independent of the SQL)."""
    if col.kind == "intercept":
        return np.ones(len(rows))
    if col.kind == "numeric":
        return rows[col.feature].to_numpy(float)
    if col.kind == "log1p":
        return np.log1p(np.maximum(rows[col.feature].to_numpy(float), 0.0))
    if col.kind == "level":
        return (rows[col.feature].fillna("(missing)") == col.level).to_numpy(float)
    a, b = col.factors
    return values(a, rows) * values(b, rows)


def score_test(t: np.ndarray, x: np.ndarray, p: np.ndarray, z: np.ndarray) -> float:
    """Rao's score statistic for adding z to the logit of t on x (fitted p): U^2 / (I_zz - I_zx I_xx^-1 I_xz)."""
    w = p * (1 - p)
    u = z @ (t - p)
    ibb = x.T @ (w[:, None] * x)
    icb = (w * z) @ x
    v = z @ (w * z) - icb @ np.linalg.solve(ibb, icb)
    return 0.0 if v <= 1e-9 * (z @ (w * z)) else u**2 / v  # z in the span of x (a 0/1 feature squared): nothing to add


def run_stepwise(raw: dict):
    spec = parse_spec(raw)
    with DuckDBEngine(raw["study"]["database"]) as engine:
        out = run_plan(build_plan(spec, "duckdb"), spec, engine)
        rows = engine.con.execute(f"SELECT * FROM sqlmatch.{raw['study']['name']}_measures").df()
    return out.model, rows


@pytest.fixture(scope="module")
def nsw_stepwise(tmp_path_factory):
    db = tmp_path_factory.mktemp("nsw_step") / "nsw.duckdb"
    load_nsw(str(db))
    raw = nsw_spec(str(db), "score_bins", bins=10)
    raw["propensity"] = {"features": BASE, "terms": "stepwise"}
    return run_stepwise(raw)


@pytest.mark.slow
def test_nsw_selection_statistics_equal_numpy_score_tests(nsw_stepwise):
    """NSW treated vs CPS men (causaldata, Dehejia & Wahba 1999): each added term's statistic equals
    the score test computed with numpy on the rows at statsmodels' Logit fit of the terms before it,
    and it is the largest among the candidates of its order."""
    model, rows = nsw_stepwise
    t = rows.treated.to_numpy(float)
    assert model.selection, "NSW's CPS comparison needs more than the linear terms"
    added = {c.describes: c for c in model.columns}
    current = [c for c in model.columns if c.describes not in {s["term"] for s in model.selection}]
    for step in model.selection:
        x = np.column_stack([values(c, rows) for c in current])
        cands = (first_order_candidates if step["order"] == 1 else second_order_candidates)(current)
        # candidates whose refit separated the groups are skipped by design (model.refused)
        p = sm.Logit(t, x).fit(disp=0, tol=1e-12, maxiter=200).predict(x)
        stats = {c.describes: score_test(t, x, p, values(c, rows)) for c in cands if c.describes not in model.refused}
        assert step["statistic"] == pytest.approx(stats[step["term"]], rel=1e-6)
        assert stats[step["term"]] == pytest.approx(max(stats.values()), rel=1e-9)
        current = current + [added[step["term"]]]
    assert [c.describes for c in current] == [c.describes for c in model.columns]


@pytest.mark.slow
def test_nsw_stopping_rule_and_final_fit(nsw_stepwise):
    """Imbens & Rubin's constants (C_lin = 1, C_qua = 2.71): every added term beat its threshold; the
    final coefficients equal statsmodels Logit on the same design (to 1e-6); the model file keeps the terms."""
    model, rows = nsw_stepwise
    for step in model.selection:
        assert step["statistic"] > (1.0 if step["order"] == 1 else 2.71)
    x = np.column_stack([values(c, rows) for c in model.columns])
    fit = sm.Logit(rows.treated.to_numpy(float), x).fit(disp=0, tol=1e-12, maxiter=200)
    np.testing.assert_allclose(model.coefficients, fit.params, rtol=1e-6, atol=1e-9)
    again = FittedModel.from_json(model.to_json())
    assert again.columns == model.columns and again.selection == model.selection


def simulated(tmp_path, n=6000, seed=7) -> dict:
    """Simulation with a known truth: take-up is logistic in log(1 + trips), trips a skewed count."""
    rng = np.random.default_rng(seed)
    trips = rng.negative_binomial(1, 0.02, n).astype(float)  # mean ~49, long right tail
    km = rng.gamma(2.0, 4.0, n)
    p = 1 / (1 + np.exp(-(-3.0 + 0.8 * np.log1p(trips) - 0.05 * km)))
    treated = rng.random(n) < p
    units = pd.DataFrame({"rider_id": np.arange(1, n + 1), "enrolled_on": pd.to_datetime(np.where(treated, "1976-01-15", None)), "trips": trips, "km": km})
    events = pd.DataFrame({"rider_id": units.rider_id, "paid_on": pd.Timestamp("1977-06-30"), "earnings": rng.normal(size=n)})
    db = str(tmp_path / "sim.duckdb")
    with duckdb.connect(db) as con:
        con.register("u", units)
        con.register("e", events)
        con.execute("CREATE TABLE men AS SELECT * FROM u")
        con.execute("CREATE TABLE earnings AS SELECT rider_id AS person_id, CAST(paid_on AS DATE) AS paid_on, earnings FROM e")
        con.execute("ALTER TABLE men RENAME COLUMN rider_id TO person_id")
    raw = nsw_spec(db, "score_bins", bins=10)
    raw["study"]["name"] = "sim"
    raw["features"] = [{"name": n, "aggregate": "attribute", "attribute": n} for n in ("trips", "km")]
    raw["propensity"] = {"features": ["trips", "km"], "terms": "stepwise"}
    return raw


def test_log_of_a_skewed_count_is_chosen(tmp_path):
    """Simulation (known truth): take-up logistic in log1p(trips); the chosen terms include it."""
    model, _ = run_stepwise(simulated(tmp_path))
    assert "log(1 + trips)" in [c.describes for c in model.columns]
    assert model.selection[0]["term"] == "log(1 + trips)"


def test_linear_is_the_base_terms_only(tmp_path):
    raw = simulated(tmp_path)
    raw["propensity"]["terms"] = "linear"
    model, _ = run_stepwise(raw)
    assert [c.describes for c in model.columns] == ["intercept", "trips", "km"] and model.selection == []


def test_unknown_terms_value_names_the_key(tmp_path):
    raw = simulated(tmp_path)
    raw["propensity"]["terms"] = "quadratic"
    with pytest.raises(SpecError, match="propensity.terms"):
        parse_spec(raw)


def test_postgres_chooses_the_same_terms_as_duckdb(tmp_path):
    """The same simulation on PostgreSQL: the same chosen terms and statistics as DuckDB."""
    import os

    url = os.environ.get("SQLMATCH_TEST_POSTGRES_URL")
    if not url:
        pytest.skip("no PostgreSQL server (SQLMATCH_TEST_POSTGRES_URL)")
    from sqlmatch.engines.postgres import PostgresEngine

    raw = simulated(tmp_path)
    duck, _ = run_stepwise(raw)
    with duckdb.connect(raw["study"]["database"], read_only=True) as con:
        men = con.execute("SELECT * FROM men").df()
        earnings = con.execute("SELECT * FROM earnings").df()
    import psycopg

    with psycopg.connect(url, autocommit=True) as pg:
        pg.execute("DROP SCHEMA IF EXISTS stepwise_src CASCADE")
        pg.execute("CREATE SCHEMA stepwise_src")
        pg.execute("CREATE TABLE stepwise_src.men (person_id BIGINT, enrolled_on DATE, trips DOUBLE PRECISION, km DOUBLE PRECISION)")
        pg.execute("CREATE TABLE stepwise_src.earnings (person_id BIGINT, paid_on DATE, earnings DOUBLE PRECISION)")
        with pg.cursor() as cur:
            cur.executemany("INSERT INTO stepwise_src.men VALUES (%s, %s, %s, %s)", [(int(r.person_id), None if pd.isna(r.enrolled_on) else r.enrolled_on.date(), float(r.trips), float(r.km)) for r in men.itertuples()])
            cur.executemany("INSERT INTO stepwise_src.earnings VALUES (%s, %s, %s)", [(int(r.person_id), r.paid_on, float(r.earnings)) for r in earnings.itertuples()])
    raw["study"] = {"name": "sim", "work_schema": "stepwise_work", "database": url}
    raw["units"]["table"] = "stepwise_src.men"
    raw["events"]["table"] = "stepwise_src.earnings"
    spec = parse_spec(raw)
    try:
        with PostgresEngine(url) as engine:
            out = run_plan(build_plan(spec, "postgres"), spec, engine)
    finally:
        with psycopg.connect(url, autocommit=True) as pg:
            pg.execute("DROP SCHEMA IF EXISTS stepwise_src CASCADE")
            pg.execute("DROP SCHEMA IF EXISTS stepwise_work CASCADE")
    assert [c.describes for c in out.model.columns] == [c.describes for c in duck.columns]
    for a, b in zip(out.model.selection, duck.selection):
        assert a["statistic"] == pytest.approx(b["statistic"], rel=1e-6)
