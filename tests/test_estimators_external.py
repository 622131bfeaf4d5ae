"""Aggregate-only estimators checked against independent computations.

Sources named beside each check: statsmodels and scipy as reference libraries, row-level numpy
recomputations of the published formulas, and simulations with a known truth.
"""

from __future__ import annotations

import math
from types import SimpleNamespace
import sys

import numpy as np
import pytest
import scipy.stats as st
import statsmodels.api as sm
from statsmodels.stats.contingency_tables import Table2x2
from statsmodels.stats.proportion import confint_proportions_2indep, proportion_confint
from statsmodels.stats.weightstats import DescrStatsW

from sqlmatch.estimators.binary import risk_ratio
from sqlmatch.estimators.pairs import paired_difference, signed_rank
from sqlmatch.estimators.ratio import RatioSums, ratio_effect, ratio_estimate

Z95 = st.norm.ppf(0.975)


# ---------------------------------------------------------------------------------------------
# helpers: simulated bike-share riders (invented data, known truth)
# ---------------------------------------------------------------------------------------------


def _simulate_ratio_rows(rng, n_strata=6, sizes=(5, 40), lift=1.15):
    """Rows (stratum, treated, trips x, fares y) for invented riders; pass holders pay less per trip."""
    rows = []
    for s in range(n_strata):
        for g in (1, 0):
            n = int(rng.integers(*sizes))
            x = rng.poisson(3 + s, n) + 1.0
            fare_per_trip = (2.0 + 0.3 * s) * (lift if g == 1 else 1.0)
            y = x * fare_per_trip + rng.normal(0, 1.5, n) * np.sqrt(x)
            rows.append((s, g, x, y))
    return rows


def _sums(rows, g, n_strata):
    out = {k: np.zeros(n_strata) for k in ("n", "sum_y", "sum_x", "sum_yy", "sum_xx", "sum_xy")}
    for s, gg, x, y in rows:
        if gg != g:
            continue
        out["n"][s] = len(x)
        out["sum_y"][s] = y.sum()
        out["sum_x"][s] = x.sum()
        out["sum_yy"][s] = (y * y).sum()
        out["sum_xx"][s] = (x * x).sum()
        out["sum_xy"][s] = (x * y).sum()
    return RatioSums(**out)


def _row_level_ratio(rows, g, w, pool_singletons=False):
    """Independent row-level recomputation of the combined ratio and its linearised variance
    (Cochran 1977, Sampling Techniques, ch. 6, combined ratio estimate; residuals e = y - R x)."""
    cells = {s: (x, y) for s, gg, x, y in rows if gg == g}
    strata = sorted(s for s in cells if w[s] > 0)
    ws = np.array([w[s] for s in strata])
    ws = ws / ws.sum()
    ybar = np.array([cells[s][1].mean() for s in strata])
    xbar = np.array([cells[s][0].mean() for s in strata])
    r = np.sum(ws * ybar) / np.sum(ws * xbar)
    s2 = []
    for s in strata:
        x, y = cells[s]
        e = y - r * x
        s2.append(np.var(e, ddof=1) if len(e) > 1 else np.nan)
    s2 = np.array(s2)
    ns = np.array([len(cells[s][0]) for s in strata], dtype=float)
    if pool_singletons:
        resid_ss = [np.sum((cells[s][1] - r * cells[s][0] - np.mean(cells[s][1] - r * cells[s][0])) ** 2) for s in strata]
        multi = ns > 1
        pooled = np.sum(np.array(resid_ss)[multi]) / np.sum(ns[multi] - 1)
        s2 = np.where(multi, s2, pooled)
    var = np.sum(ws**2 * s2 / ns) / np.sum(ws * xbar) ** 2
    return r, var


# ---------------------------------------------------------------------------------------------
# ratio outcomes
# ---------------------------------------------------------------------------------------------


def test_ratio_matches_row_level_linearisation():
    # Source: row-level numpy recomputation of Cochran (1977) ch. 6 combined ratio estimate and its
    # delta-method variance, ATT stratum weights n_1s / n_1.
    rng = np.random.default_rng(20240601)
    rows = _simulate_ratio_rows(rng)
    treated, control = _sums(rows, 1, 6), _sums(rows, 0, 6)
    w = treated.n / treated.n.sum()
    r1, v1 = _row_level_ratio(rows, 1, w)
    r0, v0 = _row_level_ratio(rows, 0, w)

    res = ratio_effect(treated, control, level=0.95)
    assert res.treated.estimate == pytest.approx(r1, rel=1e-9)
    assert res.control.estimate == pytest.approx(r0, rel=1e-9)
    assert res.treated.std_error == pytest.approx(math.sqrt(v1), rel=1e-9)
    assert res.control.std_error == pytest.approx(math.sqrt(v0), rel=1e-9)
    assert res.estimate == pytest.approx(r1 - r0, rel=1e-9)
    assert res.std_error == pytest.approx(math.sqrt(v1 + v0), rel=1e-9)
    assert res.ci_low == pytest.approx(r1 - r0 - Z95 * math.sqrt(v1 + v0), rel=1e-9)
    assert res.ci_high == pytest.approx(r1 - r0 + Z95 * math.sqrt(v1 + v0), rel=1e-9)
    # Relative lift: delta method on log(R1/R0) (variance v1/R1^2 + v0/R0^2), mapped back.
    log_se = math.sqrt(v1 / r1**2 + v0 / r0**2)
    assert res.lift == pytest.approx(r1 / r0 - 1, rel=1e-9)
    assert res.lift_ci_low == pytest.approx(math.exp(math.log(r1 / r0) - Z95 * log_se) - 1, rel=1e-9)
    assert res.lift_ci_high == pytest.approx(math.exp(math.log(r1 / r0) + Z95 * log_se) - 1, rel=1e-9)
    assert res.lift_std_error == pytest.approx(r1 / r0 * log_se, rel=1e-9)


def test_ratio_custom_weights_and_level_match_row_level():
    # Source: row-level numpy recomputation (as above) with user-given stratum weights and a 90% level.
    rng = np.random.default_rng(7)
    rows = _simulate_ratio_rows(rng, n_strata=4)
    treated, control = _sums(rows, 1, 4), _sums(rows, 0, 4)
    w = np.array([0.0, 2.0, 1.0, 5.0])  # stratum 0 excluded by weight 0
    r1, v1 = _row_level_ratio(rows, 1, w)
    res = ratio_estimate(treated, weights=w, level=0.90)
    z90 = st.norm.ppf(0.95)
    assert res.estimate == pytest.approx(r1, rel=1e-9)
    assert res.ci_high - res.estimate == pytest.approx(z90 * math.sqrt(v1), rel=1e-9)


def test_ratio_single_stratum_equals_wls_with_hc1():
    # Source: statsmodels WLS of y on x (no intercept) with weights 1/x gives slope sum y / sum x, the
    # ratio estimator (Cochran 1977, ch. 6, ratio estimate as weighted least squares - recalled);
    # its HC1 sandwich variance (MacKinnon & White 1985) equals sum e^2 / ((n-1) n xbar^2), the
    # delta-method variance s_e^2 / (n xbar^2) since the residuals sum to zero.
    rng = np.random.default_rng(11)
    x = rng.poisson(4, 250) + 1.0
    y = 2.4 * x + rng.normal(0, 1.0, 250) * x
    sums = RatioSums([len(x)], [y.sum()], [x.sum()], [(y * y).sum()], [(x * x).sum()], [(x * y).sum()])
    res = ratio_estimate(sums)
    fit = sm.WLS(y, x[:, None], weights=1.0 / x).fit(cov_type="HC1")
    assert res.estimate == pytest.approx(fit.params[0], rel=1e-12)
    assert res.std_error == pytest.approx(fit.bse[0], rel=1e-9)


def test_ratio_singleton_pooling_matches_row_level():
    # Source: row-level numpy recomputation; single-unit strata take the group's pooled within-stratum
    # residual variance (common practice for strata too small to estimate their own variance).
    rng = np.random.default_rng(3)
    rows = _simulate_ratio_rows(rng, n_strata=5)
    # make stratum 2 hold a single control
    rows = [(s, g, x[:1], y[:1]) if (s == 2 and g == 0) else (s, g, x, y) for s, g, x, y in rows]
    treated, control = _sums(rows, 1, 5), _sums(rows, 0, 5)
    with pytest.raises(ValueError, match="single unit"):
        ratio_effect(treated, control)
    res = ratio_effect(treated, control, singleton="pool")
    w = treated.n / treated.n.sum()
    r0, v0 = _row_level_ratio(rows, 0, w, pool_singletons=True)
    assert res.control.estimate == pytest.approx(r0, rel=1e-9)
    assert res.control.std_error == pytest.approx(math.sqrt(v0), rel=1e-9)


def test_ratio_missing_control_stratum_raises():
    # A stratum with treated units but no controls has no counterfactual: refuse rather than guess.
    t = RatioSums([3, 4], [9.0, 8.0], [3.0, 4.0], [30.0, 20.0], [3.0, 4.0], [9.0, 8.0])
    c = RatioSums([5, 0], [10.0, 0.0], [5.0, 0.0], [25.0, 0.0], [5.0, 0.0], [10.0, 0.0])
    with pytest.raises(ValueError, match="no units"):
        ratio_effect(t, c)


def test_ratio_interval_coverage_in_simulation():
    # Simulation with a known truth: population fare-per-trip ratios are fixed by construction;
    # the delta-method interval should cover R1 - R0 about 95% of the time and the mean standard
    # error should track the spread of the estimates (large-sample theory, Cochran 1977 ch. 6).
    rng = np.random.default_rng(99)
    n_strata, reps = 4, 400
    base = np.array([2.0, 2.5, 3.0, 3.5])
    n1 = np.array([60, 40, 30, 20])
    n0 = np.array([80, 60, 50, 40])
    w = n1 / n1.sum()
    # E[y | x] = ratio * x in each stratum, E[x] = 3 + s + 1 -> population combined ratio per group
    ex = np.arange(n_strata) + 4.0
    truth = np.sum(w * base * 1.1 * ex) / np.sum(w * ex) - np.sum(w * base * ex) / np.sum(w * ex)
    est, se, cover = [], [], 0
    for _ in range(reps):
        sums = []
        for g, ns, mult in ((1, n1, 1.1), (0, n0, 1.0)):
            acc = {k: np.zeros(n_strata) for k in ("n", "sum_y", "sum_x", "sum_yy", "sum_xx", "sum_xy")}
            for s in range(n_strata):
                x = rng.poisson(3 + s, ns[s]) + 1.0
                y = base[s] * mult * x + rng.normal(0, 1.0, ns[s]) * np.sqrt(x)
                acc["n"][s], acc["sum_y"][s], acc["sum_x"][s] = ns[s], y.sum(), x.sum()
                acc["sum_yy"][s], acc["sum_xx"][s], acc["sum_xy"][s] = (y * y).sum(), (x * x).sum(), (x * y).sum()
            sums.append(RatioSums(**acc))
        r = ratio_effect(sums[0], sums[1])
        est.append(r.estimate)
        se.append(r.std_error)
        cover += r.ci_low <= truth <= r.ci_high
    assert abs(np.mean(se) / np.std(est, ddof=1) - 1) < 0.15
    assert 0.90 <= cover / reps <= 0.99
    assert abs(np.mean(est) - truth) < 3 * np.std(est) / math.sqrt(reps) + 1e-3


# ---------------------------------------------------------------------------------------------
# binary outcomes
# ---------------------------------------------------------------------------------------------


@pytest.mark.parametrize("a,n1,c,n0", [(30, 100, 20, 110), (7, 45, 15, 52), (120, 400, 95, 410)])
def test_binary_unstratified_matches_statsmodels(a, n1, c, n0):
    # Source: statsmodels Table2x2 (risk ratio with the Katz log interval, Katz et al. 1978) and
    # confint_proportions_2indep (log-ratio interval) as reference implementations. (The risk
    # difference users get is the stratified difference in means of the 0/1 outcome, tested with
    # the other continuous estimators.)
    res = SimpleNamespace(risk_ratio=risk_ratio(a, n1, c, n0))
    t = Table2x2(np.array([[a, n1 - a], [c, n0 - c]]))
    lo, hi = t.riskratio_confint(alpha=0.05, method="normal")
    assert res.risk_ratio.estimate == pytest.approx(t.riskratio, rel=1e-12)
    assert res.risk_ratio.log_std_error == pytest.approx(t.log_riskratio_se, rel=1e-12)
    assert res.risk_ratio.ci_low == pytest.approx(lo, rel=1e-9)
    assert res.risk_ratio.ci_high == pytest.approx(hi, rel=1e-9)
    lo_r, hi_r = confint_proportions_2indep(a, n1, c, n0, method="log", compare="ratio", alpha=0.05)
    assert (res.risk_ratio.ci_low, res.risk_ratio.ci_high) == pytest.approx((lo_r, hi_r), rel=1e-9)
    # Relative lift is RR - 1 with the RR interval shifted by one.
    assert res.risk_ratio.lift == pytest.approx(t.riskratio - 1, rel=1e-12)
    assert res.risk_ratio.lift_ci_low == pytest.approx(lo - 1, rel=1e-9)


def test_binary_level_parameter_matches_statsmodels_alpha():
    # Source: statsmodels confint_proportions_2indep and Table2x2 at alpha = 0.10.
    rr = risk_ratio(40, 150, 30, 160, level=0.90)
    lo, hi = Table2x2(np.array([[40, 110], [30, 130]])).riskratio_confint(alpha=0.10)
    assert (rr.ci_low, rr.ci_high) == pytest.approx((lo, hi), rel=1e-9)


def test_binary_stratified_matches_row_level_and_statsmodels_per_stratum():
    # Sources: row-level numpy (0/1 outcomes) for the ATT-weighted risks; per-stratum Wald variances
    # p(1-p)/n recovered from statsmodels proportion_confint(method='normal'); log-RR variance by the
    # delta method (Katz et al. 1978).
    rng = np.random.default_rng(5)
    n1 = np.array([40, 25, 60, 10])
    n0 = np.array([90, 30, 45, 35])
    y1 = [rng.binomial(1, p, n) for p, n in zip([0.3, 0.4, 0.5, 0.2], n1)]
    y0 = [rng.binomial(1, p, n) for p, n in zip([0.2, 0.3, 0.35, 0.1], n0)]
    e1 = np.array([y.sum() for y in y1])
    e0 = np.array([y.sum() for y in y0])
    res = SimpleNamespace(risk_ratio=risk_ratio(e1, n1, e0, n0))

    w = n1 / n1.sum()
    p1 = np.sum(w * np.array([y.mean() for y in y1]))
    p0 = np.sum(w * np.array([y.mean() for y in y0]))
    assert p1 == pytest.approx(np.concatenate(y1).mean(), rel=1e-12)  # ATT weights: crude treated risk
    v1 = np.sum(w**2 * np.array([np.var(y, ddof=0) / len(y) for y in y1]))
    v0 = np.sum(w**2 * np.array([np.var(y, ddof=0) / len(y) for y in y0]))

    def sm_var(e, n):
        lo, hi = proportion_confint(e, n, alpha=0.05, method="normal")
        return ((hi - lo) / (2 * Z95)) ** 2

    v0_sm = np.sum(w**2 * np.array([sm_var(e, n) for e, n in zip(e0, n0)]))
    assert v0 == pytest.approx(v0_sm, rel=1e-9)

    rr = res.risk_ratio
    log_se = math.sqrt(v1 / p1**2 + v0 / p0**2)
    assert rr.estimate == pytest.approx(p1 / p0, rel=1e-12)
    assert rr.log_std_error == pytest.approx(log_se, rel=1e-9)
    assert rr.ci_low == pytest.approx(p1 / p0 * math.exp(-Z95 * log_se), rel=1e-9)
    assert rr.ci_high == pytest.approx(p1 / p0 * math.exp(Z95 * log_se), rel=1e-9)


def test_binary_stratified_coverage_in_simulation():
    # Simulation with a known truth: the ATT-weighted risks are fixed by construction; the
    # log-scale RR interval should cover about 95% of the time (large-sample theory).
    rng = np.random.default_rng(17)
    n1 = np.array([80, 60, 100])
    n0 = np.array([150, 90, 120])
    pt = np.array([0.30, 0.45, 0.55])
    pc = np.array([0.20, 0.35, 0.40])
    w = n1 / n1.sum()
    rr_true = np.sum(w * pt) / np.sum(w * pc)
    reps = 600
    e1 = rng.binomial(n1, pt, size=(reps, 3))
    e0 = rng.binomial(n0, pc, size=(reps, 3))
    cov_rr = 0
    for i in range(reps):
        r = risk_ratio(e1[i], n1, e0[i], n0)
        cov_rr += r.ci_low <= rr_true <= r.ci_high
    assert 0.92 <= cov_rr / reps <= 0.975


def test_binary_zero_events_give_no_log_interval():
    # With no control events the risk ratio is infinite and the log-scale interval does not exist.
    rr = risk_ratio(5, 50, 0, 40)
    assert math.isinf(rr.estimate)
    assert math.isnan(rr.ci_low) and math.isnan(rr.ci_high)
    with pytest.raises(ValueError):
        risk_ratio([5, 3], [50, 10], [2, 0], [40, 0])  # treated stratum with no controls
    with pytest.raises(ValueError):
        risk_ratio(60, 50, 2, 40)  # more events than units


# ---------------------------------------------------------------------------------------------
# matched pairs
# ---------------------------------------------------------------------------------------------


def test_paired_difference_matches_scipy_and_statsmodels():
    # Sources: scipy.stats.ttest_1samp (t statistic, p-value) and statsmodels DescrStatsW
    # (standard error, t interval) on the same differences.
    rng = np.random.default_rng(21)
    d = rng.normal(0.4, 2.0, 73)
    res = paired_difference(len(d), d.sum(), (d * d).sum(), level=0.95)
    tt = st.ttest_1samp(d, 0.0)
    ds = DescrStatsW(d)
    assert res.estimate == pytest.approx(d.mean(), rel=1e-12)
    assert res.t_stat == pytest.approx(tt.statistic, rel=1e-9)
    assert res.p_value == pytest.approx(tt.pvalue, rel=1e-9)
    assert res.std_error == pytest.approx(ds.std_mean, rel=1e-9)
    lo, hi = ds.tconfint_mean(alpha=0.05)
    assert (res.ci_low, res.ci_high) == pytest.approx((lo, hi), rel=1e-9)
    lo90, hi90 = ds.tconfint_mean(alpha=0.10)
    r90 = paired_difference(len(d), d.sum(), (d * d).sum(), level=0.90)
    assert (r90.ci_low, r90.ci_high) == pytest.approx((lo90, hi90), rel=1e-9)


def _signed_rank_aggregates(d):
    """What the SQL side returns: zeros dropped, average ranks of |d|, T+, n, sum of (t^3 - t)."""
    nz = d[d != 0]
    ranks = st.rankdata(np.abs(nz))  # average ranks for ties
    _, counts = np.unique(np.abs(nz), return_counts=True)
    return ranks[nz > 0].sum(), len(nz), float(np.sum(counts**3 - counts)), ranks


@pytest.mark.parametrize("seed,shift", [(1, 0.3), (2, -0.2), (3, 0.0), (4, 0.8)])
def test_signed_rank_matches_scipy_wilcoxon(seed, shift):
    # Source: scipy.stats.wilcoxon(zero_method='wilcox', correction=False, method='approx').
    # Rounded data create ties and zero differences.
    rng = np.random.default_rng(seed)
    d = np.round(rng.normal(shift, 1.0, 60), 1)
    t_plus, n, ties, ranks = _signed_rank_aggregates(d)
    assert ties > 0 and n < len(d)  # the case exercises both ties and dropped zeros
    res = signed_rank(t_plus, n, ties)
    two = st.wilcoxon(d, zero_method="wilcox", correction=False, method="approx")
    greater = st.wilcoxon(d, zero_method="wilcox", correction=False, method="approx", alternative="greater")
    less = st.wilcoxon(d, zero_method="wilcox", correction=False, method="approx", alternative="less")
    assert res.p_value == pytest.approx(two.pvalue, abs=1e-9)
    assert res.p_greater == pytest.approx(greater.pvalue, abs=1e-9)
    assert res.p_less == pytest.approx(less.pvalue, abs=1e-9)
    # scipy reports min(T+, T-) for the two-sided test and T+ for the one-sided ones.
    assert min(res.t_plus, res.t_minus) == pytest.approx(two.statistic, abs=1e-9)
    assert res.t_plus == pytest.approx(greater.statistic, abs=1e-9)
    # Rosenbaum-bound inputs: sum of ranks and of squared ranks over the non-zero pairs.
    assert res.sum_ranks == pytest.approx(ranks.sum(), rel=1e-12)
    assert res.sum_ranks_sq == pytest.approx((ranks**2).sum(), rel=1e-12)


def test_signed_rank_without_ties_matches_textbook_moments():
    # Source: Wilcoxon (1945) null moments E = n(n+1)/4, Var = n(n+1)(2n+1)/24, checked against the
    # exact null distribution by enumerating all 2^n sign patterns for n = 10.
    n = 10
    q = np.arange(1, n + 1)
    signs = ((np.arange(2**n)[:, None] >> np.arange(n)) & 1).astype(float)
    t_all = signs @ q
    res = signed_rank(30, n, 0.0)
    assert res.expected == pytest.approx(t_all.mean(), rel=1e-12)
    assert res.variance == pytest.approx(t_all.var(), rel=1e-12)
    with pytest.raises(ValueError):
        signed_rank(56, n)  # above n(n+1)/2


def test_normal_based_estimators_do_not_need_scipy(monkeypatch):
    # Runtime rule: normal quantiles come from the standard library, not scipy.
    monkeypatch.setitem(sys.modules, "scipy", None)
    monkeypatch.setitem(sys.modules, "scipy.stats", None)
    assert risk_ratio(10, 50, 5, 50).ci_low > 0
    assert signed_rank(40, 10, 0).p_value > 0
    t = RatioSums([10], [30.0], [10.0], [100.0], [12.0], [33.0])
    assert ratio_estimate(t).std_error > 0
