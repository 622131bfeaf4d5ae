"""The covariances of several cohorts' effects (sqlmatch/cohorts.py, cohort_influence and
cohort_covariance in SQL) against independent computations on the rows of a small warehouse.

Count, sum and 0/1 outcomes: each cohort's stratified effect is a fixed linear combination of its
cell means (cohort x stratum x group), and the cell means are the coefficients of an OLS
regression of the stacked rows on cell indicators. statsmodels' cluster-robust covariance by unit
(Liang & Zeger 1986, sandwich without small-sample correction) then gives Cov(effect_c, effect_c')
= L_c' V L_c'. Ratio outcomes: each unit's term is the derivative of the cohort's ratio effect
with respect to that unit's weight, computed here by finite differences of the estimator
recomputed with pandas."""

from __future__ import annotations

import shutil

import duckdb
import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from sqlmatch import api
from sqlmatch.cohorts import pooled_interval_refusal
from sqlmatch.estimators.pooling import pool, pool_covarying
from sqlmatch.plan import measure_columns

from conftest import DEMO_SPEC
from test_engines import demo_db, demo_spec, demo_tables, postgres, postgres_url, spark, spark_engine  # noqa: F401 (fixtures, shared)

MONTHS = ["2026-02", "2026-03", "2026-04"]


@pytest.fixture(scope="module")
def cohorts(demo_dir, tmp_path_factory):
    """The pooled run, and each month's matched rows read from a run of that month alone."""
    folder = tmp_path_factory.mktemp("cohort_cov")
    shutil.copyfile(demo_dir / "bikeshare.duckdb", folder / "bikeshare.duckdb")
    # coarse cut points and half the riders: few cells and rows, so the reference regression on
    # cell indicators stays small
    text = DEMO_SPEC.read_text().replace("pre_trips = [1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 12, 14, 16, 18, 21, 25, 30, 40]", "pre_trips = [3, 10]")
    text = text.replace("filters = [\"signup_date < DATE '2025-09-01'\"]", "filters = [\"signup_date < DATE '2025-09-01'\", \"rider_id % 2 = 0\"]")
    assert "pre_trips = [3, 10]" in text and "rider_id % 2" in text
    (folder / "annual_pass.toml").write_text(text)
    spec = api.load(folder / "annual_pass.toml")
    combined = api.run_cohorts(spec, f"{MONTHS[0]}:{MONTHS[-1]}", keep_tables=False)
    _, outcomes = measure_columns(spec)
    rows = {}
    for month in MONTHS:
        api.run(spec.with_overrides(cohort=month), keep_tables=True)
        with duckdb.connect(str(folder / "bikeshare.duckdb"), read_only=True) as con:
            rows[month] = con.execute(
                f"SELECT * FROM {spec.work_schema}.{spec.name}_weighted_units WHERE match__weight IS NOT NULL"
            ).df()
    with duckdb.connect(str(folder / "bikeshare.duckdb"), read_only=True) as con:
        left = [t for (t,) in con.execute("SELECT table_name FROM information_schema.tables").fetchall() if "influence" in t]
    return spec, combined, outcomes, rows, left


def plain(effect):
    """A month's stratified effect: its unadjusted one where the headline is regression-adjusted."""
    return effect.unadjusted if effect.unadjusted is not None else effect


def kept_cells(frame: pd.DataFrame) -> pd.DataFrame:
    """Matched rows of the strata holding both groups, with the ATT stratum weight n_1s / n_1."""
    both = frame.groupby("match__stratum")["treated"].agg(["min", "max"])
    frame = frame[frame["match__stratum"].isin(both.index[(both["min"] == 0) & (both["max"] == 1)])].copy()
    n1 = frame[frame["treated"] == 1].groupby("match__stratum").size()
    frame["w_s"] = frame["match__stratum"].map(n1 / n1.sum())
    return frame


def test_covariances_of_mean_outcomes_equal_statsmodels_cluster_robust_by_unit(cohorts):
    spec, combined, outcomes, rows, _ = cohorts
    for o in [o for o in outcomes if o.kind != "ratio"]:
        stacked = pd.concat([kept_cells(rows[m]).assign(cohort=c) for c, m in enumerate(MONTHS)], ignore_index=True)
        stacked["cell"] = stacked["cohort"].astype(str) + "|" + stacked["match__stratum"].astype(str) + "|" + stacked["treated"].astype(str)
        cells = sorted(stacked["cell"].unique())
        X = pd.get_dummies(stacked["cell"]).reindex(columns=cells).astype(float).to_numpy()
        fit = sm.OLS(stacked[o.name].astype(float).to_numpy(), X).fit(
            cov_type="cluster", cov_kwds={"groups": pd.factorize(stacked["unit_key"])[0], "use_correction": False}
        )
        L = np.zeros((len(MONTHS), len(cells)))
        first = stacked.drop_duplicates("cell").set_index("cell")
        for j, cell in enumerate(cells):
            r = first.loc[cell]
            L[int(r["cohort"]), j] = r["w_s"] if r["treated"] == 1 else -r["w_s"]
        # the cohorts' effects are these combinations of the cell means (the reported estimates)
        # (the stratified ones: the months' headlines are regression-adjusted by default, the influence terms are not)
        reported = [plain(r.effect(o.name)).estimate for r in combined.cohorts]
        assert L @ fit.params == pytest.approx(reported, rel=1e-9), o.name
        # statsmodels OLS cluster-robust covariance (by unit), mapped to the cohorts' effects
        reference = L @ fit.cov_params() @ L.T
        ours = np.asarray(combined.covariances[o.name])
        assert ours == pytest.approx(reference, rel=1e-8, abs=1e-12), o.name
        # a real check: units serve in several months here, so the months covary
        assert reference[0, 1] > 0 and reference[1, 2] > 0, o.name


def ratio_effect_of(frame: pd.DataFrame, num: str, den: str, weight: np.ndarray) -> float:
    """R_1 - R_0 of the combined ratio estimate (Cochran 1977) with unit weights in the cell means."""
    f = frame.assign(omega=weight)
    out = {}
    for g in (0, 1):
        part = f[f["treated"] == g]
        sums = part.assign(wy=part["omega"] * part[num], wx=part["omega"] * part[den]).groupby("match__stratum")[["omega", "wy", "wx", "w_s"]].agg(
            {"omega": "sum", "wy": "sum", "wx": "sum", "w_s": "first"}
        )
        out[g] = float((sums["w_s"] * sums["wy"] / sums["omega"]).sum() / (sums["w_s"] * sums["wx"] / sums["omega"]).sum())
    return out[1] - out[0]


def ratio_terms(frame: pd.DataFrame, num: str, den: str) -> np.ndarray:
    """Each unit's derivative of R_1 - R_0 with respect to its weight, in closed form: the cell
    means' derivative is (value - cell mean) / n, carried through R_g = Y_g / X_g."""
    psi = np.zeros(len(frame))
    for g, sign in ((1, 1.0), (0, -1.0)):
        at = (frame["treated"] == g).to_numpy()
        part = frame[at]
        cell = part.groupby("match__stratum")
        n, my, mx = cell[num].transform("size"), cell[num].transform("mean"), cell[den].transform("mean")
        means = cell.agg(y=(num, "mean"), x=(den, "mean"), w=("w_s", "first"))
        y_g, x_g = float((means["w"] * means["y"]).sum()), float((means["w"] * means["x"]).sum())
        r = y_g / x_g
        psi[at] = sign * part["w_s"] / n * ((part[num] - my) - r * (part[den] - mx)) / x_g
    return psi


def test_covariances_of_a_ratio_outcome_equal_the_derivatives_of_the_estimator(cohorts):
    spec, combined, outcomes, rows, _ = cohorts
    o = next(o for o in outcomes if o.kind == "ratio")
    terms = []
    for month in MONTHS:
        frame = kept_cells(rows[month]).reset_index(drop=True)
        psi = ratio_terms(frame, o.num, o.den)
        # the closed form is the derivative: central differences of the estimator, recomputed with
        # pandas, for 12 units of each group
        base, h = np.ones(len(frame)), 1e-5
        picks = np.r_[np.flatnonzero(frame["treated"] == 1)[:12], np.flatnonzero(frame["treated"] == 0)[:12]]
        for i in picks:
            up, down = base.copy(), base.copy()
            up[i], down[i] = 1 + h, 1 - h
            numeric = (ratio_effect_of(frame, o.num, o.den, up) - ratio_effect_of(frame, o.num, o.den, down)) / (2 * h)
            assert numeric == pytest.approx(psi[i], rel=1e-5, abs=1e-6 * np.abs(psi).max()), (month, i)
        # the plain ratio (the headline is regression-adjusted by default, ratio outcomes too)
        assert float(ratio_effect_of(frame, o.num, o.den, base)) == pytest.approx(plain(combined.cohorts[MONTHS.index(month)].effect(o.name)).estimate, rel=1e-9)
        terms.append(pd.Series(psi, index=frame["unit_key"]))
    table = pd.concat(terms, axis=1).fillna(0.0).to_numpy()
    assert np.asarray(combined.covariances[o.name]) == pytest.approx(table.T @ table, rel=1e-8)


def test_pooled_interval_uses_the_covariances_and_the_work_tables_are_gone(cohorts):
    spec, combined, outcomes, rows, left = cohorts
    assert left == []  # the influence tables are dropped once the covariances are fetched
    for p in combined.pooled:
        headlines = [r.effect(p.outcome) for r in combined.cohorts]
        n = np.array([e.n_treated for e in headlines], dtype=float)
        w = n / n.sum()
        # the influence terms are the stratified estimator's: where the months' headlines are
        # regression-adjusted (the default for coarsened_exact), the unadjusted effects are pooled, and said so
        adjusted = [e.unadjusted is not None for e in headlines]
        # every outcome but the ratio fare_per_trip (the default common slope leaves ratios unadjusted)
        assert all(adjusted) == (p.outcome != "fare_per_trip") and any(adjusted) == ("unadjusted" in (p.note or ""))
        effects = [e.unadjusted if e.unadjusted is not None else e for e in headlines]
        cov = np.asarray(combined.covariances[p.outcome]).copy()
        np.fill_diagonal(cov, [e.std_error**2 for e in effects])  # each month's own variance, as reported
        assert p.estimate == pytest.approx(float(w @ [e.estimate for e in effects]), rel=1e-12)
        assert p.std_error == pytest.approx(float(np.sqrt(w @ cov @ w)), rel=1e-12)
        assert p.std_error_if_independent == pytest.approx(float(np.sqrt(np.sum(w**2 * np.diag(cov)))), rel=1e-12)
        assert p.std_error > p.std_error_if_independent


def test_generalised_q_with_no_covariance_is_cochrans_q():
    """With a diagonal covariance the GLS residual Q is Cochran's Q of the inverse-variance pool
    (itself checked against statsmodels' combine_effects in test_pooling.py)."""
    est, se = [4.1, 4.9, 3.7, 5.6], [0.5, 0.4, 0.6, 0.7]
    ours = pool_covarying(est, se, np.zeros((4, 4)), [1, 1, 1, 1])
    ref = pool(est, se)
    assert ours.q == pytest.approx(ref.q, rel=1e-12)
    assert ours.i_squared == pytest.approx(ref.i_squared, rel=1e-12)
    assert ours.std_error == pytest.approx(np.sqrt(np.sum(np.square(se))) / 4, rel=1e-12)


@pytest.mark.parametrize(
    ("override", "words"),
    [({"matching": {"method": "nearest_neighbour"}}, "nearest_neighbour"), ({"matching": {"method": "score_weighting"}}, "score_weighting")],
)
def test_no_pooled_interval_where_the_months_covariances_are_not_computed(override, words):
    import tomllib

    from sqlmatch.spec import parse_spec

    raw = tomllib.loads(DEMO_SPEC.read_text())
    for key, value in override.items():
        raw[key] = {**raw.get(key, {}), **value}
    raw["matching"].pop("cut_points", None) if "method" in override.get("matching", {}) else None
    refusal = pooled_interval_refusal(parse_spec(raw))
    assert refusal is not None and words in refusal and "covary" in refusal


def test_postgres_gives_duckdbs_covariances(postgres, demo_db):  # noqa: F811
    """The two templates on PostgreSQL: the same covariances and pooled figures as on DuckDB."""
    from sqlmatch.engines.duckdb import DuckDBEngine

    engine, tag = postgres
    months = "2026-02:2026-03"
    with DuckDBEngine(demo_db) as duck:
        want = api.run_cohorts(demo_spec("main", "sqlmatch_duckdb_cohorts"), months, engine=duck, keep_tables=False)
    got = api.run_cohorts(demo_spec(tag, f"{tag}_work"), months, engine=engine, keep_tables=False)
    assert sorted(got.covariances) == sorted(want.covariances)
    for outcome, matrix in want.covariances.items():
        assert np.asarray(got.covariances[outcome]) == pytest.approx(np.asarray(matrix), rel=1e-9), outcome
    for a, b in zip(got.pooled, want.pooled):
        assert (a.estimate, a.std_error) == pytest.approx((b.estimate, b.std_error), rel=1e-9), a.outcome
    assert not [t for t in engine.table_names(f"{tag}_work") if "influence" in t]


@pytest.mark.slow
def test_spark_gives_duckdbs_covariances(spark, demo_db):  # noqa: F811
    """The two templates on Spark (slow: two studies on a local Spark session)."""
    from sqlmatch.engines.duckdb import DuckDBEngine

    engine, tag = spark
    months = "2026-02:2026-03"
    with DuckDBEngine(demo_db) as duck:
        want = api.run_cohorts(demo_spec("main", "sqlmatch_duckdb_cohorts"), months, engine=duck, keep_tables=False)
    got = api.run_cohorts(demo_spec(tag, f"{tag}_work"), months, engine=engine, keep_tables=False)
    for outcome, matrix in want.covariances.items():
        assert np.asarray(got.covariances[outcome]) == pytest.approx(np.asarray(matrix), rel=1e-9), outcome
    for a, b in zip(got.pooled, want.pooled):
        assert (a.estimate, a.std_error) == pytest.approx((b.estimate, b.std_error), rel=1e-9), a.outcome
