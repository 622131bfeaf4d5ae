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
    try:
        bread = np.linalg.inv(jac)
    except np.linalg.LinAlgError:
        return WeightedEffect(mu1 - mu0, None, None, None, mu1, mu0, np.full((2, 2), nan))
    cov = (bread @ meat @ bread.T)[:2, :2]
    var = cov[0, 0] + cov[1, 1] - 2 * cov[0, 1]
    se = math.sqrt(var) if math.isfinite(var) and var >= 0 else None
    lo, hi = normal_interval(mu1 - mu0, se, level)
    return WeightedEffect(mu1 - mu0, se, lo, hi, mu1, mu0, cov)
