"""Relative lifts, risk ratios, difference-in-differences and sensitivity figures of the demo study
against independent computations on the same rows.

As in test_reference_checks.py, the test itself reads row-level data from the demo warehouse
(sqlmatch never does) and recomputes each figure with numpy / pandas / statsmodels / scipy;
sqlmatch's figures come only from aggregates.
"""

from __future__ import annotations

import dataclasses

import json
import math
import shutil
import tomllib

import duckdb
import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
import statsmodels.api as sm

from sqlmatch.effects import study_results
from sqlmatch import aggregates, api
from sqlmatch.engines.duckdb import DuckDBEngine
from sqlmatch.errors import SpecError
from sqlmatch.estimators.att import relative_lift
from sqlmatch.estimators.regression import uncentred_intercept, wls_from_moments
from sqlmatch.plan import build_plan
from sqlmatch.report.markdown import render_markdown
from sqlmatch.runner import run_plan
from sqlmatch.sensitivity import (
    e_value,
    e_value_continuous,
    plain_words,
    robustness_value,
    rosenbaum_from_signed_rank,
    rosenbaum_scan,
)
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC

Z95 = st.norm.ppf(0.975)


@pytest.fixture(scope="module")
def study(demo_dir, tmp_path_factory):
    folder = tmp_path_factory.mktemp("effects")
    database = folder / "bikeshare.duckdb"
    shutil.copyfile(demo_dir / "bikeshare.duckdb", database)
    # the plain stratified estimator, checked against the rows here (the regression-adjusted
    # default has its own checks in test_adjusted_estimator.py)
    spec = dataclasses.replace(api.load(DEMO_SPEC), regression_adjustment=False)
    with DuckDBEngine(str(database)) as engine:
        output = run_plan(build_plan(spec, "duckdb"), spec, engine)
    results = study_results(spec, output.plan, output)
    with duckdb.connect(str(database), read_only=True) as con:
        rows = con.execute(
            "SELECT m.*, w.match__stratum AS stratum, w.match__weight AS weight FROM sqlmatch.annual_pass_measures m "
            "LEFT JOIN sqlmatch.annual_pass_weighted_units w USING (unit_key)"
        ).df()
    return spec, output, results, rows


def _matched(rows):
    return rows[rows.weight.notna()]


def _stratified_mean_variances(matched: pd.DataFrame, column: str) -> tuple[float, float]:
    """Var of the two stratified means, sum_s w_s^2 s2_gs / n_gs (Imbens & Rubin 2015, ch. 17),
    recomputed with pandas; a stratum whose group has one unit borrows the group's pooled variance."""
    g = matched.groupby(["stratum", "treated"])[column].agg(["count", "var"]).unstack("treated")
    out = []
    n1 = g[("count", 1)]
    w = n1 / n1.sum()
    for t in (1, 0):
        n, var = g[("count", t)], g[("var", t)]
        ok = n >= 2
        pooled = ((n[ok] - 1) * var[ok]).sum() / (n[ok] - 1).sum()
        out.append(float(np.sum(w**2 * var.where(ok, pooled) / n)))
    return out[0], out[1]


# ---------------------------------------------------------------------------------------------
# Relative lift and risk ratio


@pytest.mark.parametrize("outcome", ["post_trips", "post_minutes"])
def test_continuous_lift_equals_the_rows(study, outcome):
    """Lift = ATT / weighted control mean = m1 / m0 - 1; interval: delta method on log(m1 / m0) with
    the two stratified means independent, exp(log(m1/m0) +/- z sqrt(v1/m1^2 + v0/m0^2)) - 1."""
    _, _, results, rows = study
    matched = _matched(rows)
    t, c = matched[matched.treated == 1], matched[matched.treated == 0]
    m1 = t[outcome].mean()
    m0 = np.average(c[outcome], weights=c.weight)  # weighted control mean (matching weights)
    e = results.effect(outcome)
    assert e.lift.estimate == pytest.approx(m1 / m0 - 1, rel=1e-9)
    assert e.lift.estimate == pytest.approx(e.estimate / e.mean_control, rel=1e-9)
    v1, v0 = _stratified_mean_variances(matched, outcome)
    log_se = math.sqrt(v1 / m1**2 + v0 / m0**2)
    assert e.lift.ci_low == pytest.approx(math.exp(math.log(m1 / m0) - Z95 * log_se) - 1, rel=1e-9)
    assert e.lift.ci_high == pytest.approx(math.exp(math.log(m1 / m0) + Z95 * log_se) - 1, rel=1e-9)
    assert e.lift.ci_low < e.lift.estimate < e.lift.ci_high


def test_lift_standard_error_is_the_delta_method_by_numerical_gradient():
    """Delta method (Casella & Berger 2002, §5.5.4, recalled): Var g(m1, m0) ~= grad' diag(v1, v0) grad
    for g = m1/m0 - 1, with the gradient taken numerically here (central differences)."""
    for m1, v1, m0, v0 in [(9.5, 0.06, 5.2, 0.01), (0.3, 0.002, 0.8, 0.0004), (-1.5, 0.04, 2.0, 0.09)]:
        g = lambda a, b: a / b - 1  # noqa: E731
        h = 1e-6
        d1 = (g(m1 + h, m0) - g(m1 - h, m0)) / (2 * h)
        d0 = (g(m1, m0 + h) - g(m1, m0 - h)) / (2 * h)
        lift = relative_lift(m1, v1, m0, v0)
        assert lift.estimate == pytest.approx(m1 / m0 - 1, rel=1e-12)
        assert lift.std_error == pytest.approx(math.sqrt(d1**2 * v1 + d0**2 * v0), rel=1e-6)
        assert lift.scale == ("log" if m1 > 0 else "linear")
        if lift.scale == "linear":  # a negative mean: symmetric interval on the lift scale
            assert lift.ci_high - lift.estimate == pytest.approx(Z95 * lift.std_error, rel=1e-9)


def test_binary_risk_ratio_equals_the_rows(study):
    """RR = p1 / p0 with ATT stratum weights; Var(log RR) = Var(p1)/p1^2 + Var(p0)/p0^2 with
    Var(p_g) = sum_s w_s^2 p_gs (1 - p_gs) / n_gs (Cochran 1977 ch. 5; Katz et al. 1978), from the rows."""
    _, _, results, rows = study
    matched = _matched(rows)
    g = matched.groupby(["stratum", "treated"]).active_last_month.agg(["sum", "count"]).unstack("treated")
    n1, n0 = g[("count", 1)], g[("count", 0)]
    p1s, p0s = g[("sum", 1)] / n1, g[("sum", 0)] / n0
    w = n1 / n1.sum()
    p1, p0 = float((w * p1s).sum()), float((w * p0s).sum())
    # p1 is the plain treated share; p0 the control share under the matching weights
    t, c = matched[matched.treated == 1], matched[matched.treated == 0]
    assert p1 == pytest.approx(t.active_last_month.mean(), rel=1e-12)
    assert p0 == pytest.approx(np.average(c.active_last_month, weights=c.weight), rel=1e-12)
    var1 = float((w**2 * p1s * (1 - p1s) / n1).sum())
    var0 = float((w**2 * p0s * (1 - p0s) / n0).sum())
    log_se = math.sqrt(var1 / p1**2 + var0 / p0**2)
    e = results.effect("active_last_month")
    assert e.risk_ratio.estimate == pytest.approx(p1 / p0, rel=1e-9)
    assert e.risk_ratio.ci_low == pytest.approx(math.exp(math.log(p1 / p0) - Z95 * log_se), rel=1e-9)
    assert e.risk_ratio.ci_high == pytest.approx(math.exp(math.log(p1 / p0) + Z95 * log_se), rel=1e-9)
    assert e.lift.estimate == pytest.approx(p1 / p0 - 1, rel=1e-9)
    assert e.lift.ci_low == pytest.approx(e.risk_ratio.ci_low - 1, rel=1e-9)
    assert e.estimate == pytest.approx(p1 - p0, rel=1e-9)  # the risk difference stays the effect


def test_ratio_lift_equals_weighted_sums(study):
    _, _, results, rows = study
    matched = _matched(rows)
    r = {}
    for t in (0, 1):
        g = matched[matched.treated == t]
        r[t] = (g.weight * g.fare_per_trip__num).sum() / (g.weight * g.fare_per_trip__den).sum()
    e = results.effect("fare_per_trip")
    assert e.lift.estimate == pytest.approx(r[1] / r[0] - 1, rel=1e-9)
    assert e.lift.ci_low < e.lift.estimate < e.lift.ci_high
    assert e.risk_ratio is None and e.did is None


# ---------------------------------------------------------------------------------------------
# Weighted regression from aggregates (input of the robustness value)


def _design(spec, matched, outcome, kind):
    """Rows, outcome and weights of the regression as statsmodels sees them."""
    features = [f.name for f in spec.numeric_features]
    if kind == "ratio":
        # linearised ratio z = R_g + (y - R_g x) / xbar_g, R_g and xbar_g with the matching weights
        rows, w, t = matched, matched.weight, matched.treated
        num, den = rows[f"{outcome}__num"], rows[f"{outcome}__den"]
        r = t.map({g: (w * num)[t == g].sum() / (w * den)[t == g].sum() for g in (0, 1)})
        xbar = t.map({g: (w * den)[t == g].sum() / w[t == g].sum() for g in (0, 1)})
        y, weights = r + (num - r * den) / xbar, w
    else:
        rows, y, weights = matched, matched[outcome], matched.weight
    X = sm.add_constant(rows[["treated", *features]].astype(float))
    return X, y.astype(float), weights.astype(float), features


@pytest.mark.parametrize("outcome, kind", [("post_trips", "continuous"), ("post_minutes", "continuous"), ("fare_per_trip", "ratio"), ("active_last_month", "binary")])
def test_wls_from_aggregates_equals_statsmodels(study, outcome, kind):
    """beta = (X'WX)^-1 X'Wy, sigma^2 = RSS / (n - p), Cov = sigma^2 (X'WX)^-1 from the one-row query,
    against statsmodels WLS on the same rows with the same (analytic) weights."""
    spec, output, results, rows = study
    X, y, weights, features = _design(spec, _matched(rows), outcome, kind)
    ref = sm.WLS(y, X, weights=weights).fit()
    sums = aggregates.regression_sums(output.results["outcome_regression"], outcome, kind, features)
    fit = wls_from_moments(sums.xtx, sums.xty, sums.yty, sums.n, sums.names)
    assert fit.dropped == ()
    assert fit.n == int(ref.nobs) and fit.df == int(ref.df_resid)
    for name in ["treated", *features]:
        assert fit.coef(name) == pytest.approx(ref.params[name], rel=1e-9, abs=1e-12)
    intercept = uncentred_intercept(fit, "intercept", sums.y_centre, sums.x_centres)
    assert intercept == pytest.approx(ref.params["const"], rel=1e-9)
    assert fit.t("treated") == pytest.approx(ref.tvalues["treated"], rel=1e-6)
    assert fit.se("treated") == pytest.approx(ref.bse["treated"], rel=1e-6)
    assert fit.rss == pytest.approx(ref.ssr, rel=1e-6)
    s = results.effect(outcome).sensitivity
    assert s["t_statistic"] == pytest.approx(ref.tvalues["treated"], rel=1e-6)
    assert s["df"] == int(ref.df_resid)
    assert s["regression_estimate"] == pytest.approx(ref.params["treated"], rel=1e-9)
    assert s["adjusted_for"] == features


def test_regression_without_covariates_gives_the_ratio_of_weighted_sums():
    """The linearised ratio z = R_g + (y - R_g x) / xbar_g: WLS of z on treatment with weights w has
    treatment coefficient sum(w y)/sum(w x) | treated - the same | control (invented numbers,
    statsmodels), whatever the denominators."""
    rng = np.random.default_rng(5)
    n = 400
    t = rng.integers(0, 2, n).astype(float)
    x = rng.poisson(3 + 6 * t, n).astype(float)
    yv = x * (2.0 - 0.7 * t) + rng.normal(0, 1, n)
    w = rng.uniform(0.5, 2.0, n)
    r = {g: (w * yv)[t == g].sum() / (w * x)[t == g].sum() for g in (0, 1)}
    xbar = {g: (w * x)[t == g].sum() / w[t == g].sum() for g in (0, 1)}
    rg, xg = np.where(t == 1, r[1], r[0]), np.where(t == 1, xbar[1], xbar[0])
    fit = sm.WLS(rg + (yv - rg * x) / xg, sm.add_constant(t), weights=w).fit()
    assert fit.params[1] == pytest.approx(r[1] - r[0], rel=1e-10)


def test_collinear_column_is_dropped_and_the_rest_equals_statsmodels():
    rng = np.random.default_rng(11)
    n = 300
    t = rng.integers(0, 2, n).astype(float)
    a = rng.normal(0, 1, n)
    b = 2.0 * a  # exactly collinear with a
    yv = 1.0 + 0.5 * t + a + rng.normal(0, 1, n)
    w = rng.uniform(0.2, 3.0, n)
    X = np.column_stack([np.ones(n), t, a, b])
    W = np.diag(w)
    fit = wls_from_moments(X.T @ W @ X, X.T @ W @ yv, float(yv @ W @ yv), n, ("intercept", "treated", "a", "b"))
    assert fit.dropped == ("b",) and fit.p == 3
    ref = sm.WLS(yv, X[:, :3], weights=w).fit()
    assert fit.coef("treated") == pytest.approx(ref.params[1], rel=1e-8)
    assert fit.t("treated") == pytest.approx(ref.tvalues[1], rel=1e-6)
    assert fit.df == int(ref.df_resid)


def test_regression_query_returns_one_row(study):
    _, output, _, _ = study
    assert len(output.results["outcome_regression"].rows) == 1


# ---------------------------------------------------------------------------------------------
# Sensitivity wiring


def _pooled_sd(spec, matched, outcome, kind):
    """sqrt((s2_1 + s2_0) / 2), each group's variance weighted (numpy.cov with aweights)."""
    X, y, weights, _ = _design(spec, matched, outcome, kind)
    v = []
    for g in (1, 0):
        sel = X.treated == g
        v.append(float(np.cov(y[sel], aweights=weights[sel])))
    return math.sqrt((v[0] + v[1]) / 2)


@pytest.mark.parametrize("outcome, kind", [("post_trips", "continuous"), ("post_minutes", "continuous"), ("fare_per_trip", "ratio")])
def test_e_value_of_a_difference_uses_the_pooled_sd(study, outcome, kind):
    """E-value through RR ~= exp(0.91 d), d = effect / pooled SD (VanderWeele & Ding 2017)."""
    spec, _, results, rows = study
    e = results.effect(outcome)
    sd = _pooled_sd(spec, _matched(rows), outcome, kind)
    s = e.sensitivity
    assert s["e_value_sd"] == pytest.approx(sd, rel=1e-9)
    ref = e_value_continuous(e.estimate, e.std_error, sd)
    assert s["e_value"] == pytest.approx(ref.point, rel=1e-9)
    assert s["e_value_ci"] == pytest.approx(ref.ci, rel=1e-9)
    assert s["e_value_rr"] == pytest.approx(math.exp(0.91 * e.estimate / sd), rel=1e-9)


def test_e_value_of_a_binary_outcome_uses_the_risk_ratio(study):
    _, _, results, _ = study
    e = results.effect("active_last_month")
    ref = e_value(e.risk_ratio.estimate, e.risk_ratio.ci_low, e.risk_ratio.ci_high)
    assert e.sensitivity["e_value"] == pytest.approx(ref.point, rel=1e-12)
    assert e.sensitivity["e_value_ci"] == pytest.approx(ref.ci, rel=1e-12)
    # VanderWeele & Ding (2017): E = RR + sqrt(RR (RR - 1)) for RR > 1
    rr = e.risk_ratio.estimate
    assert e.sensitivity["e_value"] == pytest.approx(rr + math.sqrt(rr * (rr - 1)), rel=1e-12)


@pytest.mark.parametrize("outcome, kind", [("post_trips", "continuous"), ("fare_per_trip", "ratio"), ("active_last_month", "binary")])
def test_robustness_value_and_sentence_are_wired(study, outcome, kind):
    """RV from statsmodels' t and residual df (Cinelli & Hazlett 2020); the sentence is the plain
    words of the E-value and of the robustness value."""
    spec, _, results, rows = study
    X, y, weights, _ = _design(spec, _matched(rows), outcome, kind)
    ref = sm.WLS(y, X, weights=weights).fit()
    rv = robustness_value(ref.tvalues["treated"], ref.df_resid)
    s = results.effect(outcome).sensitivity
    assert s["robustness_value"] == pytest.approx(rv.rv_q, rel=1e-6)
    assert s["robustness_value_alpha"] == pytest.approx(rv.rv_q_alpha, rel=1e-6)
    assert s["partial_r2"] == pytest.approx(ref.tvalues["treated"] ** 2 / (ref.tvalues["treated"] ** 2 + ref.df_resid), rel=1e-6)
    own_rv = robustness_value(s["t_statistic"], s["df"])
    ev = e_value(s["e_value_rr"], *_rr_limits(results.effect(outcome), kind))
    assert s["sentence"] == plain_words(ev, "enrolment", outcome) + " " + plain_words(own_rv, "enrolment", outcome)


def _rr_limits(e, kind):
    if kind == "binary":
        return e.risk_ratio.ci_low, e.risk_ratio.ci_high
    ev = e_value_continuous(e.estimate, e.std_error, e.sensitivity["e_value_sd"])
    return ev.rr_ci_low, ev.rr_ci_high


def test_rosenbaum_is_null_with_a_reason_without_pairs(study):
    _, _, results, _ = study
    data = json.loads(results.to_json(), parse_constant=lambda c: pytest.fail(f"{c} in results.json"))
    for effect in data["effects"]:
        s = effect["sensitivity"]
        assert s["rosenbaum"] is None
        assert "1:1 matched pairs" in s["rosenbaum_reason"] and "coarsened_exact" in s["rosenbaum_reason"]
        assert {"e_value", "e_value_ci", "robustness_value", "robustness_value_alpha", "partial_r2", "t_statistic", "df", "sentence"} <= set(s)
        assert {"lift", "risk_ratio", "did"} <= set(effect) and {"estimate", "ci_low", "ci_high"} <= set(effect["lift"])


@pytest.mark.parametrize("seed, shift", [(1, 0.4), (2, -0.3)])
def test_rosenbaum_seam_takes_signed_rank_aggregates(seed, shift):
    """The seam for a pair method: bounds from (T+, non-zero pairs, tie term) equal the bounds from
    the ranks themselves, and at Gamma = 1 scipy's one-sided Wilcoxon p-value (Rosenbaum 2002, ch. 4)."""
    rng = np.random.default_rng(seed)
    d = np.round(rng.normal(shift, 1.0, 90), 1)
    nz = d[d != 0]
    q = st.rankdata(np.abs(nz))
    t_plus = q[nz > 0].sum()
    _, counts = np.unique(np.abs(nz), return_counts=True)
    tie_term = float(np.sum(counts**3 - counts))
    alternative = "greater" if shift > 0 else "less"
    scan = rosenbaum_from_signed_rank(t_plus, len(nz), tie_term, alternative=alternative)
    ref = rosenbaum_scan(t_plus, q.sum(), (q**2).sum(), alternative=alternative)
    assert scan.gamma_at_alpha == pytest.approx(ref.gamma_at_alpha, rel=1e-9)
    wil = st.wilcoxon(d, zero_method="wilcox", correction=False, method="approx", alternative=alternative)
    assert scan.rows[0].p_upper == pytest.approx(wil.pvalue, abs=1e-9)


# ---------------------------------------------------------------------------------------------
# Difference-in-differences


def test_did_equals_pandas(study):
    """ATT of (post_trips - pre_trips) with the stratified estimator, recomputed from the rows; the
    point estimate also equals WLS of the difference on treatment with the matching weights."""
    _, _, results, rows = study
    matched = _matched(rows).assign(diff=lambda d: d.post_trips - d.pre_trips)
    g = matched.groupby(["stratum", "treated"])["diff"].mean().unstack("treated")
    n1 = matched[matched.treated == 1].groupby("stratum").size()
    w = n1 / n1.sum()
    did = float((w * (g[1] - g[0])).sum())
    e = results.effect("post_trips")
    assert e.did_twin == "pre_trips"
    assert e.did.estimate == pytest.approx(did, rel=1e-9)
    fit = sm.WLS(matched["diff"], sm.add_constant(matched.treated.astype(float)), weights=matched.weight).fit()
    assert e.did.estimate == pytest.approx(fit.params["treated"], rel=1e-9)
    v1, v0 = _stratified_mean_variances(matched, "diff")
    assert e.did.std_error == pytest.approx(math.sqrt(v1 + v0), rel=1e-9)
    assert e.did.ci_low == pytest.approx(did - Z95 * e.did.std_error, rel=1e-9)


def test_report_shows_lift_sensitivity_and_assumptions(study):
    _, _, results, _ = study
    text = render_markdown(results)
    e = results.effect("post_trips")
    assert f"{100 * e.lift.estimate:+.1f}%" in text
    assert "## Sensitivity to unmeasured confounding" in text and "## Assumptions and cautions" in text
    assert e.sensitivity["sentence"] in text
    assert "adjusting for the numeric features" in text
    assert "risk ratio is" in text and "difference-in-differences" in text and "(6 months)" in text and "(3 months)" in text
    # every assumption, and what the intervals are for, in plain words
    for a in results.assumptions:
        assert a in text
    assert any(a.startswith("What the intervals are for") for a in results.assumptions)


# ---------------------------------------------------------------------------------------------
# Spec: twin


def _raw_spec():
    return tomllib.loads(DEMO_SPEC.read_text())


@pytest.mark.parametrize(
    "outcome_index, twin, message",
    [
        (0, "pre_nothing", "is not a feature"),
        (0, "age_band", "is not a numeric pre-window event feature"),
        (2, "pre_trips", "only used with count, sum or active_days"),
        (3, "pre_trips", "only used with count, sum or active_days"),
    ],
)
def test_twin_must_be_a_numeric_pre_window_event_feature(outcome_index, twin, message):
    raw = _raw_spec()
    raw["outcomes"][outcome_index]["twin"] = twin
    with pytest.raises(SpecError) as err:
        parse_spec(raw)
    name = raw["outcomes"][outcome_index]["name"]
    assert f"outcomes[{outcome_index}] ({name}).twin" in str(err.value) and message in str(err.value)


def test_numeric_attribute_is_not_a_twin():
    raw = _raw_spec()
    raw["features"].append({"name": "signup_year", "aggregate": "attribute", "attribute": "signup_year"})
    raw["outcomes"][1]["twin"] = "signup_year"
    with pytest.raises(SpecError, match=r"outcomes\[1\] \(post_minutes\)\.twin"):
        parse_spec(raw)


# ---------------------------------------------------------------------------------------------
# Calibration (slow): intervals over many simulated warehouses


@pytest.mark.slow
def test_intervals_cover_the_truth_over_40_simulations(tmp_path):
    """A simulation with a known truth: 40 seeds x 4 outcomes of the demo (coarsened exact matching),
    each a 95% interval around the effect; at least 85% must cover the simulation's expected effect
    (a wide tolerance; benchmarks/calibration.py reports coverage per method and outcome)."""
    from sqlmatch.demo_run import run_demo

    covered = total = 0
    for seed in range(1, 41):
        results, _ = run_demo(tmp_path / str(seed), riders=12_000, seed=seed)
        for effect in results.effects:
            truth = results.demo_truth[effect.outcome]
            covered += effect.ci_low <= truth <= effect.ci_high
            total += 1
        shutil.rmtree(tmp_path / str(seed))
    assert total == 160
    assert covered / total >= 0.85, f"{covered}/{total} intervals covered the truth"
