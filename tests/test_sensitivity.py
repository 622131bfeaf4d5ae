"""Sensitivity analyses checked against published formulas, worked examples and brute force."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats as st
import statsmodels.api as sm
from scipy.optimize import brentq, minimize_scalar

from sqlmatch.estimators.pairs import signed_rank
from sqlmatch.sensitivity import (
    EValue,
    RobustnessValue,
    RosenbaumScan,
    e_value,
    e_value_continuous,
    plain_words,
    robustness_value,
    rosenbaum_bound,
    rosenbaum_scan,
)


# ---------------------------------------------------------------------------------------------
# Rosenbaum bounds
# ---------------------------------------------------------------------------------------------


def _pairs(seed, n=80, shift=0.5):
    rng = np.random.default_rng(seed)
    d = np.round(rng.normal(shift, 1.0, n), 1)
    nz = d[d != 0]
    q = st.rankdata(np.abs(nz))
    return d, q, q[nz > 0].sum()


@pytest.mark.parametrize("seed,shift", [(1, 0.5), (2, 0.2), (3, -0.1)])
def test_rosenbaum_gamma_one_equals_wilcoxon_one_sided(seed, shift):
    # Source: at Gamma = 1 the bound is the randomisation distribution (Rosenbaum 2002, ch. 4), so
    # it must equal scipy.stats.wilcoxon(..., alternative='greater', correction=False, method='approx').
    d, q, t_plus = _pairs(seed, shift=shift)
    b = rosenbaum_bound(t_plus, q.sum(), (q**2).sum(), 1.0)
    ref = st.wilcoxon(d, zero_method="wilcox", correction=False, method="approx", alternative="greater")
    assert b.p_upper == pytest.approx(ref.pvalue, abs=1e-9)
    assert b.p_lower == pytest.approx(ref.pvalue, abs=1e-9)
    ref_less = st.wilcoxon(d, zero_method="wilcox", correction=False, method="approx", alternative="less")
    b_less = rosenbaum_bound(t_plus, q.sum(), (q**2).sum(), 1.0, alternative="less")
    assert b_less.p_upper == pytest.approx(ref_less.pvalue, abs=1e-9)


def test_rosenbaum_scan_is_monotone_and_finds_the_crossing():
    # Source: Rosenbaum (2002, §4.3.3, recalled): the upper bound p-value grows with Gamma and the
    # lower bound shrinks; the crossing of alpha is where the finding stops holding.
    d, q, t_plus = _pairs(4, n=120, shift=0.45)
    scan = rosenbaum_scan(t_plus, q.sum(), (q**2).sum(), alpha=0.05, gamma_max=20.0, step=0.1)
    ups = np.array([r.p_upper for r in scan.rows])
    los = np.array([r.p_lower for r in scan.rows])
    gammas = np.array([r.gamma for r in scan.rows])
    assert gammas[0] == 1.0 and gammas[-1] == pytest.approx(20.0) and len(gammas) == 191
    assert np.all(np.diff(ups) >= 0) and np.all(np.diff(los) <= 0)
    assert ups[0] < 0.05  # significant without hidden bias
    first = scan.first_gamma_above_alpha
    assert first is not None and first > 1.0
    assert np.all(ups[gammas < first - 1e-9] <= 0.05)
    assert ups[np.isclose(gammas, first)][0] > 0.05
    g = scan.gamma_at_alpha
    assert first - 0.1 - 1e-9 < g <= first + 1e-12
    assert rosenbaum_bound(t_plus, q.sum(), (q**2).sum(), g).p_upper == pytest.approx(0.05, abs=1e-9)
    frame = scan.to_frame()
    assert list(frame["gamma"].round(1)) == list(np.round(gammas, 1))


def test_rosenbaum_scan_edge_cases():
    # No finding at Gamma = 1: the first grid value already exceeds alpha.
    d, q, t_plus = _pairs(5, n=40, shift=0.0)
    scan = rosenbaum_scan(t_plus, q.sum(), (q**2).sum())
    assert scan.rows[0].p_upper > 0.05
    assert scan.first_gamma_above_alpha == 1.0 and scan.gamma_at_alpha == 1.0
    # Overwhelming evidence with a low cap: never crosses.
    n = 200
    q = np.arange(1, n + 1, dtype=float)
    scan = rosenbaum_scan(q.sum() - 1, q.sum(), (q**2).sum(), gamma_max=3.0)
    assert scan.first_gamma_above_alpha is None and scan.gamma_at_alpha is None
    assert len(scan.rows) == 21
    with pytest.raises(ValueError):
        rosenbaum_bound(10, 55, 385, 0.9)  # Gamma below 1


def test_rosenbaum_bound_by_brute_force_enumeration():
    # Independent check by enumeration of all 2^12 sign patterns for 12 pairs (Rosenbaum 2002,
    # §4.3.3, recalled): under the extreme bias each pair is positive with probability
    # p+ = Gamma/(1+Gamma) independently, so T+ = sum q_s B_s. Mean and variance are exact; the
    # normal tail is compared loosely to the exact tail.
    rng = np.random.default_rng(12)
    d = np.round(rng.normal(0.9, 1.0, 12), 1)
    d = d[d != 0]
    q = st.rankdata(np.abs(d))
    t_obs = q[d > 0].sum()
    n = len(q)
    patterns = ((np.arange(2**n)[:, None] >> np.arange(n)) & 1).astype(float)
    totals = patterns @ q
    k = patterns.sum(axis=1)
    for gamma in (1.0, 1.5, 2.0, 3.0):
        p = gamma / (1 + gamma)
        prob = p**k * (1 - p) ** (n - k)
        assert prob.sum() == pytest.approx(1.0, abs=1e-12)
        mean = np.sum(prob * totals)
        var = np.sum(prob * (totals - mean) ** 2)
        b = rosenbaum_bound(t_obs, q.sum(), (q**2).sum(), gamma)
        assert b.expected_upper == pytest.approx(mean, rel=1e-9)
        assert b.variance == pytest.approx(var, rel=1e-9)
        exact_tail = np.sum(prob[totals >= t_obs - 1e-9])
        assert abs(b.p_upper - exact_tail) < 0.05  # normal approximation, loose by design


def test_rosenbaum_upper_bound_dominates_any_allowed_bias():
    # Rosenbaum (2002, ch. 4, recalled): for any pair-specific treatment probabilities in
    # [1/(1+Gamma), Gamma/(1+Gamma)], the exact tail of T+ lies between the tails with all
    # probabilities at the two ends. Checked by exact enumeration for 10 pairs.
    rng = np.random.default_rng(8)
    n = 10
    q = np.arange(1, n + 1, dtype=float)
    patterns = ((np.arange(2**n)[:, None] >> np.arange(n)) & 1).astype(float)
    totals = patterns @ q
    t_obs = 40.0
    gamma = 2.0
    lo_p, hi_p = 1 / (1 + gamma), gamma / (1 + gamma)

    def tail(probs):
        pr = np.prod(np.where(patterns == 1, probs, 1 - probs), axis=1)
        return np.sum(pr[totals >= t_obs])

    upper, lower = tail(np.full(n, hi_p)), tail(np.full(n, lo_p))
    for _ in range(200):
        probs = rng.uniform(lo_p, hi_p, n)
        assert lower - 1e-12 <= tail(probs) <= upper + 1e-12


def test_rosenbaum_inputs_from_signed_rank_aggregates():
    # The signed-rank result carries sum q and sum q^2 (with ties) for the bounds; at Gamma = 1 both
    # routes give the same one-sided p-value (Wilcoxon 1945 tie-corrected variance = sum q^2 / 4).
    d, q, t_plus = _pairs(6)
    nz = d[d != 0]
    _, counts = np.unique(np.abs(nz), return_counts=True)
    sr = signed_rank(t_plus, len(nz), float(np.sum(counts**3 - counts)))
    b = rosenbaum_bound(sr.t_plus, sr.sum_ranks, sr.sum_ranks_sq, 1.0)
    assert b.p_upper == pytest.approx(sr.p_greater, abs=1e-12)
    assert b.variance == pytest.approx(sr.variance, rel=1e-12)


# ---------------------------------------------------------------------------------------------
# Robustness value
# ---------------------------------------------------------------------------------------------


def test_robustness_value_worked_example():
    # Cinelli & Hazlett (2020, JRSS-B 82(1):39-67) worked example, values recalled from memory:
    # t = 4.18, df = 783 -> partial R^2 ~= 0.022, RV_1 ~= 0.139, RV_{1,0.05} ~= 0.076.
    rv = robustness_value(4.18, 783, q=1.0, alpha=0.05)
    assert rv.partial_r2 == pytest.approx(0.022, abs=5e-4)
    assert rv.rv_q == pytest.approx(0.139, abs=5e-4)
    assert rv.rv_q_alpha == pytest.approx(0.076, abs=5e-4)


def test_partial_r2_identity_against_statsmodels_ols():
    # Cinelli & Hazlett (2020, §3): partial R^2 of treatment with the outcome given covariates equals
    # t^2 / (t^2 + df). Checked on an OLS fit from statsmodels, with the partial R^2 computed by
    # residualising both variables on the covariates (Frisch-Waugh-Lovell).
    rng = np.random.default_rng(31)
    n = 300
    x = rng.normal(size=(n, 3))
    dvar = (x @ np.array([0.5, -0.3, 0.2]) + rng.normal(size=n) > 0).astype(float)
    y = 1.5 * dvar + x @ np.array([1.0, 0.5, -0.7]) + rng.normal(0, 2.0, n)
    design = sm.add_constant(np.column_stack([dvar, x]))
    fit = sm.OLS(y, design).fit()
    xc = sm.add_constant(x)
    ry = sm.OLS(y, xc).fit().resid
    rd = sm.OLS(dvar, xc).fit().resid
    partial = np.corrcoef(ry, rd)[0, 1] ** 2
    rv = robustness_value(fit.tvalues[1], fit.df_resid)
    assert rv.partial_r2 == pytest.approx(partial, rel=1e-9)


def _ovb_parts(y, dvar, x, z):
    """Restricted and full OLS fits plus the confounder's partial R^2s (statsmodels)."""
    xc = sm.add_constant(x)
    res = sm.OLS(y, np.column_stack([dvar, xc])).fit()
    full = sm.OLS(y, np.column_stack([dvar, xc, z])).fit()
    rz = sm.OLS(z, xc).fit().resid
    rdx = sm.OLS(dvar, xc).fit().resid
    r2_dz = np.corrcoef(rdx, rz)[0, 1] ** 2  # R^2_{D~Z|X}
    dxc = np.column_stack([dvar, xc])
    ryd = sm.OLS(y, dxc).fit().resid
    rzd = sm.OLS(z, dxc).fit().resid
    r2_yz = np.corrcoef(ryd, rzd)[0, 1] ** 2  # R^2_{Y~Z|D,X}
    return res, full, r2_dz, r2_yz


def test_omitted_variable_bias_formulas_hold_exactly_in_sample():
    # Cinelli & Hazlett (2020, §4, recalled): |bias| = se_res * sqrt(R2_yz R2_dz / (1 - R2_dz)) * sqrt(df)
    # and se_full = se_res * sqrt((1 - R2_yz) / (1 - R2_dz)) * sqrt(df / (df - 1)). These are the
    # formulas the robustness value inverts; verified here on statsmodels OLS fits with a real
    # omitted variable, so the brute-force RV checks below rest on an external computation.
    rng = np.random.default_rng(41)
    n = 400
    x = rng.normal(size=(n, 2))
    z = rng.normal(size=n)
    dvar = 0.6 * z + x @ np.array([0.4, -0.2]) + rng.normal(size=n)
    y = 1.0 * dvar + 0.8 * z + x @ np.array([0.3, 0.3]) + rng.normal(size=n)
    res, full, r2_dz, r2_yz = _ovb_parts(y, dvar, x, z)
    df = res.df_resid
    se = res.bse[0]
    bias = se * math.sqrt(r2_yz * r2_dz / (1 - r2_dz)) * math.sqrt(df)
    assert abs(res.params[0] - full.params[0]) == pytest.approx(bias, rel=1e-8)
    se_full = se * math.sqrt((1 - r2_yz) / (1 - r2_dz)) * math.sqrt(df / (df - 1))
    assert full.bse[0] == pytest.approx(se_full, rel=1e-8)


def _brute_force_rv(t, df, q, alpha):
    """Smallest R such that a confounder with both partial R^2s <= R can move the estimate (or its
    confidence bound, if alpha is given) to (1 - q) times the estimate; from the bias and standard-error
    formulas checked above, by numerical optimisation and root finding."""
    tau, se = abs(t), 1.0  # work in standard-error units
    tcrit = st.t.ppf(1 - alpha / 2, df - 1) if alpha is not None else 0.0

    def reach(r2_y, r2_d):
        bias = se * math.sqrt(r2_y * r2_d / (1 - r2_d)) * math.sqrt(df)
        se_adj = se * math.sqrt((1 - r2_y) / (1 - r2_d)) * math.sqrt(df / (df - 1))
        return bias + tcrit * se_adj  # how far the bound can be pulled towards zero

    def best(r):  # maximise over both partial R^2s in [0, r]
        if r <= 0:
            return reach(0.0, 0.0)
        # reach() increases in r2_d (both terms do), so r2_d = r; r2_y is searched on a grid, then refined.
        grid = np.linspace(0, r, 401)
        vals = [reach(gy, r) for gy in grid]
        i = int(np.argmax(vals))
        opt = minimize_scalar(lambda gy: -reach(gy, r), bounds=(grid[max(i - 1, 0)], grid[min(i + 1, 400)]),
                              method="bounded", options={"xatol": 1e-14})
        return max(vals[i], -opt.fun)

    target = q * tau
    if best(0.0) >= target:
        return 0.0
    return brentq(lambda r: best(r) - target, 0.0, 1 - 1e-12, xtol=1e-14)


@pytest.mark.parametrize(
    "t,df,q,alpha",
    [
        (4.18, 783, 1.0, 0.05),  # ordinary case
        (4.18, 783, 0.5, 0.05),
        (2.5, 60, 1.0, 0.10),
        (40.0, 50, 1.0, 0.05),  # very strong effect: the second branch of RV_{q,alpha}
        (12.0, 30, 1.0, 0.05),
    ],
)
def test_robustness_value_matches_brute_force_definition(t, df, q, alpha):
    # Definition of the robustness value (Cinelli & Hazlett 2020, §4): the minimal strength of
    # association, equal for treatment and outcome, that removes 100q% of the estimate (RV_q) or
    # makes the reduced value fall inside the interval (RV_{q,alpha}); solved numerically here.
    rv = robustness_value(t, df, q=q, alpha=alpha)
    assert rv.rv_q == pytest.approx(_brute_force_rv(t, df, q, None), abs=1e-7)
    assert rv.rv_q_alpha == pytest.approx(_brute_force_rv(t, df, q, alpha), abs=1e-6)


def test_robustness_value_branch_points():
    # When the t-statistic is already below the critical value, RV_{q,alpha} = 0 (Cinelli & Hazlett 2020).
    rv = robustness_value(1.5, 100)
    assert rv.rv_q_alpha == 0.0 and rv.rv_q > 0
    # Sign of t does not matter.
    assert robustness_value(-4.18, 783).rv_q == pytest.approx(robustness_value(4.18, 783).rv_q, rel=1e-15)
    # Continuity where the two branches meet (f_q = 1 / f*): both sides agree.
    df = 50
    fcrit = st.t.ppf(0.975, df - 1) / math.sqrt(df - 1)
    t_edge = math.sqrt(df) / fcrit
    left = robustness_value(t_edge * (1 - 1e-9), df).rv_q_alpha
    right = robustness_value(t_edge * (1 + 1e-9), df).rv_q_alpha
    assert left == pytest.approx(right, abs=1e-6)
    assert left == pytest.approx(1 - fcrit**2, abs=1e-6)


# ---------------------------------------------------------------------------------------------
# E-value
# ---------------------------------------------------------------------------------------------


def test_e_value_worked_example():
    # VanderWeele & Ding (2017, Ann Intern Med 167:268) worked example, recalled from memory:
    # RR 3.9 (95% CI 1.8 to 8.7) -> E-value 7.26 for the estimate and 3.00 for the lower limit.
    ev = e_value(3.9, 1.8, 8.7)
    assert ev.point == pytest.approx(7.26, abs=0.005)
    assert ev.ci == pytest.approx(3.00, abs=0.005)


def test_e_value_protective_and_null_crossing():
    # VanderWeele & Ding (2017): for RR < 1 take the inverse first; use the limit nearer 1, or 1 when
    # the interval includes 1.
    ev = e_value(1 / 3.9, 1 / 8.7, 1 / 1.8)
    assert ev.point == pytest.approx(e_value(3.9).point, rel=1e-12)
    assert ev.ci == pytest.approx(3.0, rel=1e-12)
    assert e_value(1.3, 0.9, 1.8).ci == 1.0
    assert e_value(1.0).point == 1.0
    with pytest.raises(ValueError):
        e_value(2.0, 2.5, 3.0)  # estimate outside its interval


@pytest.mark.parametrize("rr", [1.05, 1.5, 3.9, 10.0])
def test_e_value_solves_the_bounding_factor(rr):
    # Ding & VanderWeele (2016, Epidemiology 27(3):368-377): a confounder with risk ratios RR_EU and
    # RR_UD can shift a risk ratio by at most B = RR_EU RR_UD / (RR_EU + RR_UD - 1). The E-value is
    # the equal value E with B(E, E) = RR; found here by root finding.
    root = brentq(lambda e: e * e / (2 * e - 1) - rr, 1.0, 1e6, xtol=1e-14)
    assert e_value(rr).point == pytest.approx(root, rel=1e-10)


def test_e_value_continuous_outcome():
    # VanderWeele & Ding (2017): for a standardised mean difference d with standard error s_d,
    # RR ~= exp(0.91 d) with interval exp(0.91 d +/- 1.78 s_d) (1.78 = 0.91 x 1.96).
    est, se, sd = 1.2, 0.3, 4.0  # e.g. extra weekly trips, its SE, outcome SD
    d, sd_d = est / sd, se / sd
    ev = e_value_continuous(est, se, sd)
    assert ev.rr == pytest.approx(math.exp(0.91 * d), rel=1e-12)
    assert ev.rr_ci_low == pytest.approx(math.exp(0.91 * d - 1.78 * sd_d), rel=1e-3)
    assert ev.rr_ci_high == pytest.approx(math.exp(0.91 * d + 1.78 * sd_d), rel=1e-3)
    rr_lo = math.exp(0.91 * d - 0.91 * st.norm.ppf(0.975) * sd_d)
    assert ev.point == pytest.approx(ev.rr + math.sqrt(ev.rr * (ev.rr - 1)), rel=1e-12)
    assert ev.ci == pytest.approx(rr_lo + math.sqrt(rr_lo * (rr_lo - 1)), rel=1e-12)
    # A negative effect gives the same E-values as its mirror image.
    neg = e_value_continuous(-est, se, sd)
    assert neg.point == pytest.approx(ev.point, rel=1e-12) and neg.ci == pytest.approx(ev.ci, rel=1e-12)


# ---------------------------------------------------------------------------------------------
# Plain words
# ---------------------------------------------------------------------------------------------


def test_plain_words_e_value():
    text = plain_words(e_value(3.9, 1.8, 8.7), treatment="the annual pass", outcome="weekly trips")
    assert "risk ratio of 7.3" in text and "(3.0 each" in text and "the annual pass" in text
    crossing = plain_words(e_value(1.3, 0.9, 1.8))
    assert "already includes no effect" in crossing and "1.9" in crossing
    assert "no effect" in plain_words(e_value(1.0))


def test_plain_words_robustness_value():
    rv = robustness_value(4.18, 783)
    text = plain_words(rv, treatment="the annual pass", outcome="fare per trip")
    assert f"{100 * rv.rv_q:.1f}%" in text and f"{100 * rv.rv_q_alpha:.1f}%" in text and "95%" in text
    assert "already reaches" in plain_words(robustness_value(1.5, 100))
    assert "shrink the estimate by 50.0%" in plain_words(robustness_value(4.18, 783, q=0.5))


def test_plain_words_rosenbaum():
    d, q, t_plus = _pairs(4, n=120, shift=0.45)
    scan = rosenbaum_scan(t_plus, q.sum(), (q**2).sum())
    text = plain_words(scan, treatment="the annual pass", outcome="weekly trips")
    assert f"{scan.gamma_at_alpha:.1f}" in text and "5% level" in text
    d, q, t_plus = _pairs(5, n=40, shift=0.0)
    assert "does not find" in plain_words(rosenbaum_scan(t_plus, q.sum(), (q**2).sum()))
    n = 200
    q = np.arange(1, n + 1, dtype=float)
    assert "would still find" in plain_words(rosenbaum_scan(q.sum() - 1, q.sum(), (q**2).sum(), gamma_max=3.0))
    with pytest.raises(TypeError):
        plain_words(0.5)


def test_result_types_are_frozen():
    for obj in (e_value(2.0), robustness_value(3.0, 100), rosenbaum_scan(40, 55, 385)):
        assert isinstance(obj, (EValue, RobustnessValue, RosenbaumScan))
        with pytest.raises(AttributeError):
            obj.alpha = 0.1  # frozen dataclasses
