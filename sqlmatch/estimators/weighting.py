"""Weighted effect on the treated with a sandwich variance that counts the estimated propensity
score (M-estimation; Lunceford & Davidian 2004, Statistics in Medicine 23:2937; Stefanski & Boos
2002, The American Statistician 56:29, for the sandwich). Pure: sums in, numbers out.

Parameters theta = (mu1, mu0, beta); per unit i (t treated, e = expit(x'beta), a the unit's
weight, a function of beta with d a / d beta = g x: for the effect on the enrolled treated 1 and
control e / (1 - e) = exp(x'beta) (g = a); on the not enrolled treated (1 - e) / e (g = -a) and
control 1; on everyone 1 / e (g = -(a - 1)) and 1 / (1 - e) (g = a - 1); g = 0 where a weight is
truncated), the stacked equations

    psi_beta = (t - e) x                          (the logit model's score)
    psi_1    = t a (u - mu1 v)                    (the weighted treated mean, or ratio when v is a denominator)
    psi_0    = (1 - t) a (u - mu0 v)              (the weighted control mean)

sum to zero at the estimate. With J = sum d psi / d theta' and B = sum psi psi',

    V = J^-1 B J^-T,   J = [[-S1v, 0, G1'], [0, -S0v, G0'], [0, 0, -(H + ridge)]],
    G_k = sum over group k of g (u - mu_k v) x,
    H = sum e (1 - e) x x',

and the effect mu1 - mu0 has variance V11 + V22 - 2 V12. A ridge penalty adds lam P to H (the fit's
own Jacobian); B keeps the unpenalised per-unit scores.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sqlmatch import columns
from sqlmatch.estimators.intervals import log_ratio_interval, normal_interval


@dataclass(frozen=True)
class GroupSums:
    """One group's sums for one term: weights a, outcome u, denominator v."""

    sum_av: float  # sum a v
    sum_au: float  # sum a u
    sum_aauu: float
    sum_aauv: float
    sum_aavv: float
    ru: np.ndarray  # sum a (t - e) u x_j
    rv: np.ndarray  # sum a (t - e) v x_j
    du: np.ndarray  # sum g u x_j, d a / d beta = g x (g = 0 where a is constant or truncated)
    dv: np.ndarray  # sum g v x_j


@dataclass(frozen=True)
class WeightingSums:
    treated: GroupSums
    control: GroupSums
    information: np.ndarray  # sum e (1 - e) x x'
    score_products: np.ndarray  # sum (t - e)^2 x x'


@dataclass(frozen=True)
class WeightedEffect:
    estimate: float
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    mean_treated: float
    mean_control: float
    covariance: np.ndarray  # 2 x 2 of (mu1, mu0)

    def ratio(self, level: float = 0.95):
        """mu1 / mu0 with its delta-method interval on the log scale: (ratio, se of the ratio, low, high)."""
        m1, m0 = self.mean_treated, self.mean_control
        if not (m1 > 0 and m0 > 0):
            return math.nan, None, None, None
        c = self.covariance
        var = c[0, 0] / m1**2 + c[1, 1] / m0**2 - 2 * c[0, 1] / (m1 * m0)
        if not math.isfinite(var) or var < 0:
            return m1 / m0, None, None, None
        lo, hi = log_ratio_interval(m1 / m0, math.sqrt(var), level)
        return m1 / m0, m1 / m0 * math.sqrt(var), lo, hi


def kish_effective_size(sum_w, sum_w2) -> float | None:
    """Kish's effective sample size (sum w)^2 / sum w^2 (Kish 1965, Survey Sampling): how many
    unweighted units the weighted ones are worth for a mean's variance."""
    if sum_w is None or not sum_w2:
        return None
    return float(sum_w) ** 2 / float(sum_w2)


def sums_from_row(row: dict, key: str) -> WeightingSums:
    """Unpack one term of the score_weighting_sandwich row (see columns.weighting)."""
    p = 0
    while columns.information(p, p) in row:
        p += 1

    def f(name):
        x = row[name]
        return 0.0 if x is None else float(x)

    def group(g):
        return GroupSums(
            *(f(columns.weighting(key, g, w)) for w in ("v", "u", "uu", "uv", "vv")),
            *(np.array([f(columns.weighting(key, g, what, j)) for j in range(p)]) for what in ("ru", "rv", "du", "dv")),
        )

    h, rr = np.empty((p, p)), np.empty((p, p))
    for i, j in columns.upper_pairs(p):
        h[i, j] = h[j, i] = f(columns.information(i, j))
        rr[i, j] = rr[j, i] = f(columns.score_products(i, j))
    return WeightingSums(
        treated=group("t"),
        control=group("c"),
        information=h,
        score_products=rr,
    )


def weighted_effect(s: WeightingSums, ridge: float = 0.0, level: float = 0.95) -> WeightedEffect:
    """mu1 - mu0 and its sandwich variance (module docstring)."""
    t, c = s.treated, s.control
    nan = math.nan
    if t.sum_av <= 0 or c.sum_av <= 0:
        return WeightedEffect(nan, None, None, None, nan, nan, np.full((2, 2), nan))
    mu1, mu0 = t.sum_au / t.sum_av, c.sum_au / c.sum_av
    p = len(s.information)
    penalty = np.eye(p) * ridge
    if p:
        penalty[0, 0] = 0.0  # intercept not penalised, as in the fit
    k = 2 + p
    jac = np.zeros((k, k))
    jac[0, 0] = -t.sum_av
    jac[1, 1] = -c.sum_av
    jac[0, 2:] = t.du - mu1 * t.dv
    jac[1, 2:] = c.du - mu0 * c.dv
    jac[2:, 2:] = -(s.information + penalty)
    meat = np.zeros((k, k))
    meat[0, 0] = t.sum_aauu - 2 * mu1 * t.sum_aauv + mu1**2 * t.sum_aavv
    meat[1, 1] = c.sum_aauu - 2 * mu0 * c.sum_aauv + mu0**2 * c.sum_aavv
    meat[0, 2:] = meat[2:, 0] = t.ru - mu1 * t.rv
    meat[1, 2:] = meat[2:, 1] = c.ru - mu0 * c.rv
    meat[2:, 2:] = s.score_products
    return difference_from_sandwich(mu1, mu0, jac, meat, level)


# --- Doubly robust effect: weighted regression adjustment -------------------------------------
#
# In each group g an outcome regression on the design columns x (the propensity model's, intercept
# first), fitted by least squares with the weights a (treated 1 and control odds for the ATT;
# inverse probability weights for the ATE), and its predictions averaged over the target units T
# (the treated for the ATT, the controls for the ATC, every weighted unit for the ATE):
#
#     mu_g = xbar_T' gamma_g,   gamma_g = (sum_g a x x')^-1 sum_g a x u,   tau = mu_1 - mu_0
#
# (regression estimation with weighted coefficients, Kang & Schafer 2007, Statistical Science
# 22:523; inverse-probability-weighted regression adjustment, Wooldridge 2007, Journal of
# Econometrics 141:1281). Consistent when either the score model or the outcome regression is
# right. Since the weighted residuals of a fit with an intercept sum to zero, mu_g = nu_g + xbar_T'
# delta_g, with delta_g the slopes (gamma_g without its intercept) and nu_g the weighted mean of
# u - x' delta_g: the plain weighted mean of an adjusted outcome plus the target's mean prediction.
#
# Variance: the stacked equations, per unit,
#
#     psi_beta = (t - e) x
#     psi_1    = t a (u - x' delta_1 - nu_1),   psi_0 = (1 - t) a (u - x' delta_0 - nu_0)
#     psi_k    = s (x' (delta_1 - delta_0) - kappa)      (s = 1 for a target unit)
#
# and tau = nu_1 - nu_0 + kappa, sandwich J^-1 B J^-T as for the plain weighted means (so the
# estimated score is counted). The slopes delta_g are held at their estimates (the variance is
# conditional on them): d tau / d delta_g = +-(xbar_T - the group's weighted mean of x), the
# feature imbalance left after weighting, which tends to zero when the score model is right, so
# then the slopes' own uncertainty adds nothing to first order (Lunceford & Davidian 2004, section
# 3.3, for the augmented estimator). Holding them keeps every sum second-order in (u, x).


@dataclass(frozen=True)
class AdjustmentSums:
    """The doubly robust effect's sums (score_weighting_sandwich with effect.regression_adjustment):
    per group (t, c) sum a x x', sum a^2 x x', sum a (t - e) x x', sum g x x'; over the target units
    sum x x' and sum (t - e) x x'; per outcome and group sum a u x and sum a^2 u x."""

    a: dict  # group -> p x p
    aa: dict
    ar: dict
    g: dict
    target: np.ndarray
    target_r: np.ndarray
    au: dict  # group -> p
    aau: dict


def adjustment_sums_from_row(row: dict, key: str) -> AdjustmentSums | None:
    """Unpack the doubly robust sums of one outcome; None when the run has none."""
    p = 0
    while columns.information(p, p) in row:
        p += 1
    if p == 0 or columns.weighting_cross("ta", 0, 0) not in row or columns.weighting(key, "t", "au", 0) not in row:
        return None

    def f(name):
        x = row[name]
        return 0.0 if x is None else float(x)

    def matrix(what):
        out = np.empty((p, p))
        for i, j in columns.upper_pairs(p):
            out[i, j] = out[j, i] = f(columns.weighting_cross(what, i, j))
        return out

    def vector(g, what):
        return np.array([f(columns.weighting(key, g, what, j)) for j in range(p)])

    return AdjustmentSums(
        a={g: matrix(g + "a") for g in "tc"},
        aa={g: matrix(g + "aa") for g in "tc"},
        ar={g: matrix(g + "ar") for g in "tc"},
        g={g: matrix(g + "g") for g in "tc"},
        target=matrix("s"),
        target_r=matrix("sr"),
        au={g: vector(g, "au") for g in "tc"},
        aau={g: vector(g, "aau") for g in "tc"},
    )


def _solve_normal_equations(xtx: np.ndarray, xty: np.ndarray) -> np.ndarray:
    """Least squares from X'WX and X'Wy, columns scaled to unit diagonal first (features such as
    squared earnings span many orders of magnitude); a column that is zero in the group or a
    linear combination of others gets no coefficient (minimum-norm solution)."""
    d = np.sqrt(np.clip(np.diag(xtx), 0.0, None))
    d = np.where(d > 0, d, 1.0)
    scaled = xtx / np.outer(d, d)
    return (np.linalg.pinv(scaled, rcond=1e-12, hermitian=True) @ (xty / d)) / d


def difference_from_sandwich(mu1: float, mu0: float, jac: np.ndarray, meat: np.ndarray, level: float = 0.95) -> WeightedEffect:
    """mu1 - mu0 with the sandwich covariance bread meat bread' of stacked estimating equations whose
    first two parameters are (mu1, mu0) (Stefanski & Boos 2002); no SE when the Jacobian is singular."""
    try:
        bread = np.linalg.inv(jac)
    except np.linalg.LinAlgError:
        return WeightedEffect(mu1 - mu0, None, None, None, mu1, mu0, np.full((2, 2), math.nan))
    cov = (bread @ meat @ bread.T)[:2, :2]
    var = cov[0, 0] + cov[1, 1] - 2 * cov[0, 1]
    se = math.sqrt(var) if math.isfinite(var) and var >= 0 else None
    lo, hi = normal_interval(mu1 - mu0, se, level)
    return WeightedEffect(mu1 - mu0, se, lo, hi, mu1, mu0, cov)


@dataclass(frozen=True)
class DoublyRobustEffect:
    estimate: float
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    mean_treated: float
    mean_control: float
    coefficients: dict  # group -> gamma_g (intercept first)


def doubly_robust_effect(s: WeightingSums, adj: AdjustmentSums, estimand: str = "att", ridge: float = 0.0, level: float = 0.95) -> DoublyRobustEffect:
    """tau = xbar_T' (gamma_1 - gamma_0) and its sandwich variance (comment above)."""
    nan = math.nan
    p = len(s.information)
    groups = {"t": s.treated, "c": s.control}
    n_target = adj.target[0, 0]
    if n_target <= 0 or any(adj.a[g][0, 0] <= 0 for g in "tc"):
        return DoublyRobustEffect(nan, None, None, None, nan, nan, {})
    xbar = adj.target[:, 0] / n_target
    gamma, delta, nu = {}, {}, {}
    for g in "tc":
        gamma[g] = _solve_normal_equations(adj.a[g], adj.au[g])
        delta[g] = np.concatenate([[0.0], gamma[g][1:]])
        nu[g] = (adj.au[g][0] - delta[g] @ adj.a[g][:, 0]) / adj.a[g][0, 0]
    diff = delta["t"] - delta["c"]
    kappa = float(xbar @ diff)
    mu1, mu0 = nu["t"] + float(xbar @ delta["t"]), nu["c"] + float(xbar @ delta["c"])
    e0 = np.zeros(p)
    e0[0] = 1.0
    c = {g: delta[g] + nu[g] * e0 for g in "tc"}  # x'c_g = x' delta_g + nu_g: u minus it is the unit's residual
    ck = diff - kappa * e0
    penalty = np.eye(p) * ridge
    penalty[0, 0] = 0.0
    k = 3 + p  # (nu_1, nu_0, kappa, beta)
    jac = np.zeros((k, k))
    meat = np.zeros((k, k))
    in_target = {"t": estimand in ("att", "ate"), "c": estimand in ("atc", "ate")}
    for row, g in ((0, "t"), (1, "c")):
        gs = groups[g]
        jac[row, row] = -adj.a[g][0, 0]
        jac[row, 3:] = gs.du - adj.g[g] @ c[g]  # sum g (u - x'c_g) x
        meat[row, row] = gs.sum_aauu - 2.0 * c[g] @ adj.aau[g] + c[g] @ adj.aa[g] @ c[g]
        meat[row, 3:] = meat[3:, row] = gs.ru - adj.ar[g] @ c[g]
        if in_target[g]:
            # a target unit of this group: s a = a (ATE), or a = 1 (the treated under the ATT, the controls under the ATC)
            meat[row, 2] = meat[2, row] = adj.au[g] @ ck - c[g] @ adj.a[g] @ ck
    jac[2, 2] = -n_target
    jac[3:, 3:] = -(s.information + penalty)
    meat[2, 2] = ck @ adj.target @ ck
    meat[2, 3:] = meat[3:, 2] = adj.target_r @ ck
    meat[3:, 3:] = s.score_products
    tau = mu1 - mu0
    try:
        bread = np.linalg.inv(jac)
    except np.linalg.LinAlgError:
        return DoublyRobustEffect(tau, None, None, None, mu1, mu0, gamma)
    grad = np.zeros(k)
    grad[:3] = (1.0, -1.0, 1.0)
    var = float(grad @ bread @ meat @ bread.T @ grad)
    se = math.sqrt(var) if math.isfinite(var) and var >= 0 else None
    lo, hi = normal_interval(tau, se, level)
    return DoublyRobustEffect(tau, se, lo, hi, mu1, mu0, gamma)


@dataclass(frozen=True)
class LevelEffects:
    """The weighted effect in each of L levels (disjoint sets of units) and their joint covariance."""

    estimates: np.ndarray  # L
    covariance: np.ndarray  # L x L: the levels share the fitted score, so they are correlated through it


def level_effects(levels: list[WeightingSums], information: np.ndarray, score_products: np.ndarray, ridge: float = 0.0) -> LevelEffects:
    """Per level l the weighted difference mu1_l - mu0_l (each group's weights normalised within the
    level), and the sandwich covariance of all of them with the score fitted on every unit: the
    stacked equations of weighted_effect with a pair (psi_1, psi_0) per level, which is zero outside
    the level, and one logit score (information and score products of the whole study). Covariance
    between levels arises only through the score."""
    L, p = len(levels), len(information)
    k = 2 * L + p
    jac, meat = np.zeros((k, k)), np.zeros((k, k))
    est = np.full(L, math.nan)
    grad = np.zeros((L, k))
    for i, s in enumerate(levels):
        for row, gs in ((2 * i, s.treated), (2 * i + 1, s.control)):
            if gs.sum_av <= 0:
                return LevelEffects(est, np.full((L, L), math.nan))
            mu = gs.sum_au / gs.sum_av
            jac[row, row] = -gs.sum_av
            jac[row, 2 * L :] = gs.du - mu * gs.dv
            meat[row, row] = gs.sum_aauu - 2 * mu * gs.sum_aauv + mu**2 * gs.sum_aavv
            meat[row, 2 * L :] = meat[2 * L :, row] = gs.ru - mu * gs.rv
        est[i] = s.treated.sum_au / s.treated.sum_av - s.control.sum_au / s.control.sum_av
        grad[i, 2 * i], grad[i, 2 * i + 1] = 1.0, -1.0
    penalty = np.eye(p) * ridge
    if p:
        penalty[0, 0] = 0.0
    jac[2 * L :, 2 * L :] = -(information + penalty)
    meat[2 * L :, 2 * L :] = score_products
    try:
        bread = np.linalg.inv(jac)
    except np.linalg.LinAlgError:
        return LevelEffects(est, np.full((L, L), math.nan))
    return LevelEffects(est, grad @ bread @ meat @ bread.T @ grad.T)


def equal_effects_test(estimates: np.ndarray, covariance: np.ndarray) -> tuple[float, int, float]:
    """Wald test that every level's effect is the same: (Cc)' (C V C')^-1 (C tau) with the
    contrasts tau_l - tau_1, chi-square on L - 1 degrees of freedom. With a diagonal V it equals
    Cochran's Q (Cochran 1954, Biometrics 10:101); here V has the levels' shared-score terms."""
    from scipy.stats import chi2

    L = len(estimates)
    c = np.hstack([-np.ones((L - 1, 1)), np.eye(L - 1)])
    d = c @ estimates
    stat = float(d @ np.linalg.solve(c @ covariance @ c.T, d))
    return stat, L - 1, float(chi2.sf(stat, L - 1))
