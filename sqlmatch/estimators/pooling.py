"""Pooling one outcome's effect across cohorts (months).

Inverse-variance weighted mean (fixed effect): w_c = 1 / se_c^2, pooled = sum w_c t_c / sum w_c,
se = 1 / sqrt(sum w_c). Heterogeneity: Cochran's Q = sum w_c (t_c - pooled)^2 on k - 1 degrees of
freedom (Cochran 1954, Biometrics 10:101) and I^2 = max(0, (Q - (k - 1)) / Q) (Higgins &
Thompson 2002, Stat Med 21:1539).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

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
