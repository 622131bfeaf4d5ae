"""Risk difference and risk ratio for a binary outcome, from per-stratum event counts.

Inputs are counts only: for each stratum s, events and units in the treated group
(events_treated, n_treated) and in the control group (events_control, n_control). Scalars
mean a single stratum (the unstratified 2x2 table).

Stratum weights default to the ATT weights w_s = n_1s / n_1. With p_gs = events_gs / n_gs:

    p_g = sum_s w_s p_gs,      Var(p_g) = sum_s w_s^2 p_gs (1 - p_gs) / n_gs

(stratified estimate of a proportion, Cochran 1977, *Sampling Techniques*, 3rd ed., ch. 5 -
section number recalled, not checked; the per-stratum binomial variance p(1-p)/n is the Wald
variance, without finite-population correction).

    RR = p_1 / p_0,  Var(log RR) ~= Var(p_1)/p_1^2 + Var(p_0)/p_0^2      (delta method)

Unstratified, the log-RR variance reduces to 1/a - 1/n_1 + 1/c - 1/n_0 (Katz, Baptista,
Azen & Pike 1978, Biometrics 34:469-474; also in Rothman, Greenland & Lash, *Modern
Epidemiology*, 3rd ed. 2008 - chapter recalled, not checked).
The RR interval is exp(log RR +/- z * se), and the relative lift is RR - 1 with the same
interval shifted by one.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sqlmatch.estimators.intervals import critical_value as _z, log_ratio_interval

__all__ = [
    "RiskRatio",
    "risk_ratio",
]


@dataclass(frozen=True)
class RiskRatio:
    estimate: float  # p_1 / p_0
    std_error: float  # delta method on the RR scale, RR * log_std_error
    log_std_error: float  # standard error of log RR
    ci_low: float  # exp(log RR - z * log_std_error)
    ci_high: float
    level: float
    risk_treated: float
    risk_control: float
    lift: float  # RR - 1
    lift_ci_low: float
    lift_ci_high: float


def _arrays(events_treated, n_treated, events_control, n_control):
    arrs = [np.atleast_1d(np.asarray(a, dtype=float)) for a in (events_treated, n_treated, events_control, n_control)]
    shapes = {a.shape for a in arrs}
    if len(shapes) != 1 or arrs[0].ndim != 1:
        raise ValueError("events and unit counts must be scalars or 1-D arrays of one common length")
    e1, n1, e0, n0 = arrs
    for name, a in zip(("events_treated", "n_treated", "events_control", "n_control"), arrs):
        if not np.all(np.isfinite(a)) or np.any(a < 0):
            raise ValueError(f"{name} must be finite and non-negative")
    if np.any(e1 > n1) or np.any(e0 > n0):
        raise ValueError("events cannot exceed the number of units in a stratum")
    return e1, n1, e0, n0


def _weights(weights, n1: np.ndarray) -> np.ndarray:
    if weights is None:
        total = float(n1.sum())
        if total <= 0:
            raise ValueError("no treated units: ATT stratum weights n_1s / n_1 are undefined")
        return n1 / total
    w = np.atleast_1d(np.asarray(weights, dtype=float))
    if w.shape != n1.shape:
        raise ValueError(f"weights must have one entry per stratum ({n1.shape[0]}), got shape {w.shape}")
    if not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise ValueError("stratum weights must be finite, non-negative and not all zero")
    return w / w.sum()


def _risks(events_treated, n_treated, events_control, n_control, weights):
    """Return (p_1, Var p_1, p_0, Var p_0) under the stratum weights."""
    e1, n1, e0, n0 = _arrays(events_treated, n_treated, events_control, n_control)
    w = _weights(weights, n1)
    used = w > 0
    if np.any(n1[used] < 1) or np.any(n0[used] < 1):
        raise ValueError(
            "a stratum with positive weight has no treated or no control units; drop strata "
            "without common support before estimating"
        )
    w = w[used] / w[used].sum()
    out = []
    for e, n in ((e1[used], n1[used]), (e0[used], n0[used])):
        p = e / n
        # Stratified proportion and its variance, sum w^2 p(1-p)/n (Cochran 1977, ch. 5).
        out.append(float(np.sum(w * p)))
        out.append(float(np.sum(w * w * p * (1.0 - p) / n)))
    return tuple(out)


def _rr(p1, v1, p0, v0, z, level) -> RiskRatio:
    nan = float("nan")
    if p0 > 0.0:
        rr = p1 / p0
    else:
        rr = math.inf if p1 > 0.0 else nan
    if p1 > 0.0 and p0 > 0.0:
        # Delta method on the log scale (Katz et al. 1978, Biometrics 34:469).
        log_se = math.sqrt(v1 / (p1 * p1) + v0 / (p0 * p0))
        lo, hi = log_ratio_interval(rr, log_se, level)
        se = rr * log_se
    else:
        # With no events in a group the log-scale interval does not exist (no continuity correction here).
        log_se = se = lo = hi = nan
    return RiskRatio(rr, se, log_se, lo, hi, level, p1, p0, rr - 1.0, lo - 1.0, hi - 1.0)


def risk_ratio(events_treated, n_treated, events_control, n_control, weights=None, level: float = 0.95) -> RiskRatio:
    """Stratified risk ratio p_1 / p_0 with a log-scale delta-method interval, plus lift = RR - 1."""
    z = _z(level)
    return _rr(*_risks(events_treated, n_treated, events_control, n_control, weights), z, level)
