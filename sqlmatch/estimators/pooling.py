"""Pooling one outcome's effect across cohorts (months).

Inverse-variance weighted mean (fixed effect): w_c = 1 / se_c^2, pooled = sum w_c t_c / sum w_c,
se = 1 / sqrt(sum w_c). Heterogeneity: Cochran's Q = sum w_c (t_c - pooled)^2 on k - 1 degrees of
freedom (Cochran 1954, Biometrics 10:101) and I^2 = max(0, (Q - (k - 1)) / Q) (Higgins &
Thompson 2002, Stat Med 21:1539). For estimates of disjoint sets of units (subgroup levels).

pool_covarying: cohorts (months) share units (a never-enrolled control serves in every month),
so their estimates covary; a fixed-weight combination with their covariances (below).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sqlmatch.estimators.intervals import critical_value


@dataclass(frozen=True)
class Pooled:
    estimate: float
    std_error: float
    ci_low: float
    ci_high: float
    cohorts: int
    q: float
    q_p_value: float | None
    i_squared: float


def pool(estimates: list[float], std_errors: list[float], level: float = 0.95) -> Pooled:
    pairs = [(t, s) for t, s in zip(estimates, std_errors) if t is not None and s is not None and s > 0 and math.isfinite(t) and math.isfinite(s)]
    if not pairs:
        raise ValueError("no cohort has an estimate with a standard error")
    w = [1.0 / s**2 for _, s in pairs]
    total = sum(w)
    est = sum(wi * t for wi, (t, _) in zip(w, pairs)) / total
    se = 1.0 / math.sqrt(total)
    z = critical_value(level)
    q = sum(wi * (t - est) ** 2 for wi, (t, _) in zip(w, pairs))
    k = len(pairs)
    p = None
    if k > 1:
        from scipy.stats import chi2  # scipy comes with statsmodels

        p = float(chi2.sf(q, k - 1))
    i2 = max(0.0, (q - (k - 1)) / q) if q > 0 else 0.0
    return Pooled(est, se, est - z * se, est + z * se, k, q, p, i2)


@dataclass(frozen=True)
class PooledCovarying:
    """Pooled effect of cohorts whose estimates covary (units that serve in several cohorts)."""

    estimate: float
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    cohorts: int
    weights: tuple[float, ...]
    q: float | None
    q_p_value: float | None
    i_squared: float | None
    std_error_if_independent: float | None  # the same weights, covariances left out


def pool_covarying(estimates, std_errors, cross, weights, level: float = 0.95) -> PooledCovarying:
    """Fixed-weight combination of cohort estimates with their covariances.

    pooled = sum_c w_c t_c with weights fixed by design (each cohort's count of the estimand's
    units, normalised), Var = w' S w. S holds each cohort's own variance (se_c^2, as its report
    states it) on the diagonal and, off it, the sums over units of the products of their influence
    terms in the two cohorts (`cross`, from SQL): the cluster-robust (by unit) covariance of the
    stacked cohort estimators (Liang & Zeger 1986, Biometrika 73:13; the clustering by unit across
    stacked cohorts as in Cengiz, Dube, Lindner & Zipperer 2019, QJE 134:1405; both recalled).
    Fixed weights keep the pooled estimate linear in the cohorts' estimates, so the covariance
    gives its variance exactly; inverse-variance weights would be estimated from the same data and
    would need the covariances to be optimal (generalised least squares).
    Heterogeneity: the generalised least squares residual Q = r' S^-1 r, r = t - mu_GLS, on k - 1
    degrees of freedom (e.g. Berkey et al. 1998, Stat Med 17:2537, recalled); with a diagonal S it
    is Cochran's Q of pool(). I^2 from it as in pool().
    """
    t = np.asarray(estimates, dtype=float)
    se = np.asarray(std_errors, dtype=float)
    s = np.array(cross, dtype=float)
    k = len(t)
    np.fill_diagonal(s, se**2)
    w = np.asarray(weights, dtype=float)
    w = w / w.sum()
    est = float(w @ t)
    var = float(w @ s @ w)
    z = critical_value(level)
    sd = math.sqrt(var) if var > 0 and math.isfinite(var) else None
    lo, hi = (est - z * sd, est + z * sd) if sd is not None else (None, None)
    independent = float(np.sum(w**2 * se**2))
    q = p = i2 = None
    if k > 1:
        try:
            np.linalg.cholesky(s)
            inv = np.linalg.inv(s)
            one = np.ones(k)
            mu = float(one @ inv @ t / (one @ inv @ one))
            r = t - mu
            q = float(r @ inv @ r)
            from scipy.stats import chi2

            p = float(chi2.sf(q, k - 1))
            i2 = max(0.0, (q - (k - 1)) / q) if q > 0 else 0.0
        except np.linalg.LinAlgError:
            pass  # covariance not positive definite: no heterogeneity test
    return PooledCovarying(est, sd, lo, hi, k, tuple(float(x) for x in w), q, p, i2, math.sqrt(independent) if independent > 0 else None)
