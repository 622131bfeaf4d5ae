"""Ratio outcomes (e.g. fare per trip = sum of fares / sum of trips) in a stratified design.

Everything here is a pure function of per-stratum aggregates; no rows are ever needed.

For each group g (treated / control) and stratum s the warehouse returns, over the units of
that cell (unweighted within the stratum):

    n, sum_y, sum_x, sum_yy (= sum y^2), sum_xx (= sum x^2), sum_xy

Stratum weights w_s default to the ATT weights n_1s / n_1 (share of treated units in s).

Estimator (combined ratio estimate, Cochran 1977, *Sampling Techniques*, 3rd ed., ch. 6,
§6.11; section numbers recalled):

    R_g = sum_s w_s ybar_gs / sum_s w_s xbar_gs

Variance by the delta method (Cochran 1977, §6.3 and §6.11): with linearised residuals
e = y - R_g x,

    Var(R_g) ~= sum_s w_s^2 s2_{e,gs} / n_gs / Xbar_g^2,   Xbar_g = sum_s w_s xbar_gs,

where s2_e is the within-stratum sample variance (divisor n - 1) of e, obtained from the sums as
(sum_yy - 2 R sum_xy + R^2 sum_xx - n ebar^2) / (n - 1) with ebar = (sum_y - R sum_x) / n.
Treated and control units are independent samples, so the variances of R_1 and R_0 add.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sqlmatch.estimators.intervals import critical_value as _z, log_ratio_interval

__all__ = [
    "RatioSums",
    "GroupRatio",
    "RatioEffect",
    "ratio_estimate",
    "ratio_effect",
]

_SINGLETON_RULES = ("error", "pool")


@dataclass(frozen=True, eq=False)
class RatioSums:
    """Per-stratum sums for one group. Every field is a 1-D array with one entry per stratum."""

    n: np.ndarray
    sum_y: np.ndarray
    sum_x: np.ndarray
    sum_yy: np.ndarray
    sum_xx: np.ndarray
    sum_xy: np.ndarray

    def __post_init__(self) -> None:
        arrays = {}
        for name in ("n", "sum_y", "sum_x", "sum_yy", "sum_xx", "sum_xy"):
            arr = np.atleast_1d(np.asarray(getattr(self, name), dtype=float))
            if arr.ndim != 1:
                raise ValueError(f"{name} must be one-dimensional (one entry per stratum)")
            if not np.all(np.isfinite(arr)):
                raise ValueError(f"{name} contains missing or infinite values")
            arrays[name] = arr
        lengths = {a.shape[0] for a in arrays.values()}
        if len(lengths) != 1:
            raise ValueError("all sums must have one entry per stratum (lengths differ)")
        if np.any(arrays["n"] < 0):
            raise ValueError("stratum counts n must be non-negative")
        for name, arr in arrays.items():
            object.__setattr__(self, name, arr)

    @property
    def n_strata(self) -> int:
        return int(self.n.shape[0])


@dataclass(frozen=True)
class GroupRatio:
    """Combined ratio estimate for one group."""

    estimate: float
    std_error: float
    ci_low: float
    ci_high: float
    level: float
    mean_y: float  # weighted mean of y, sum_s w_s ybar_s
    mean_x: float  # weighted mean of x, sum_s w_s xbar_s


@dataclass(frozen=True)
class RatioEffect:
    """Difference R_1 - R_0 and relative lift R_1 / R_0 - 1 of a ratio outcome."""

    estimate: float  # R_1 - R_0
    std_error: float
    ci_low: float
    ci_high: float
    level: float
    treated: GroupRatio
    control: GroupRatio
    lift: float  # R_1 / R_0 - 1
    lift_std_error: float  # delta method on the lift scale
    lift_ci_low: float  # interval built on the log scale, then mapped back
    lift_ci_high: float


def _default_weights(treated_n: np.ndarray) -> np.ndarray:
    total = float(treated_n.sum())
    if total <= 0:
        raise ValueError("no treated units: ATT stratum weights n_1s / n_1 are undefined")
    return treated_n / total


def _check_weights(weights, n_strata: int) -> np.ndarray:
    w = np.atleast_1d(np.asarray(weights, dtype=float))
    if w.shape != (n_strata,):
        raise ValueError(f"weights must have one entry per stratum ({n_strata}), got shape {w.shape}")
    if not np.all(np.isfinite(w)) or np.any(w < 0):
        raise ValueError("stratum weights must be finite and non-negative")
    if w.sum() <= 0:
        raise ValueError("stratum weights sum to zero")
    return w


def _ratio_parts(sums: RatioSums, w: np.ndarray, singleton: str) -> tuple[float, float, float, float]:
    """Return (R, Var(R), weighted mean y, weighted mean x) for one group."""
    if singleton not in _SINGLETON_RULES:
        raise ValueError(f"singleton must be one of {_SINGLETON_RULES}, got {singleton!r}")
    used = w > 0
    n = sums.n[used]
    if np.any(n < 1):
        raise ValueError(
            "a stratum with positive weight has no units in this group; the ratio is not estimable "
            "there (drop strata without common support before estimating)"
        )
    ws = w[used] / w[used].sum()
    ybar = sums.sum_y[used] / n
    xbar = sums.sum_x[used] / n
    mean_y = float(np.sum(ws * ybar))
    mean_x = float(np.sum(ws * xbar))
    if mean_x == 0.0:
        raise ValueError("weighted mean of the denominator is zero; the ratio is undefined")
    # Combined ratio estimate: ratio of weighted means (Cochran 1977, §6.11).
    r = mean_y / mean_x

    # Within-stratum variance of the linearised residual e = y - R x, from sums (Cochran 1977, §6.3).
    ebar = (sums.sum_y[used] - r * sums.sum_x[used]) / n
    ss_e = sums.sum_yy[used] - 2.0 * r * sums.sum_xy[used] + r * r * sums.sum_xx[used] - n * ebar * ebar
    ss_e = np.maximum(ss_e, 0.0)  # guard tiny negative values from rounding
    multi = n >= 2
    s2 = np.full(n.shape, np.nan)
    s2[multi] = ss_e[multi] / (n[multi] - 1.0)
    if np.any(~multi):
        if singleton == "error":
            raise ValueError(
                "a stratum with positive weight has a single unit in this group, so its within-stratum "
                "variance is not estimable; pass singleton='pool' to use the pooled within-stratum "
                "residual variance of this group for such strata"
            )
        if not np.any(multi):
            raise ValueError("every stratum holds a single unit of this group; no variance can be estimated")
        # Pooled within-stratum residual variance for single-unit strata (common practice).
        s2[~multi] = ss_e[multi].sum() / (n[multi] - 1.0).sum()
    # Delta-method variance of the combined ratio (Cochran 1977, §6.11).
    var = float(np.sum(ws * ws * s2 / n) / (mean_x * mean_x))
    return r, var, mean_y, mean_x


def ratio_estimate(
    sums: RatioSums,
    weights=None,
    level: float = 0.95,
    singleton: str = "error",
) -> GroupRatio:
    """Combined ratio sum_s w_s ybar_s / sum_s w_s xbar_s for one group, with a delta-method interval.

    ``weights`` are the stratum weights w_s (any positive scale; they are normalised). Without
    them every stratum gets weight n_s / n, i.e. the plain ratio of totals for this group.
    ``singleton`` chooses what to do with strata that hold one unit: ``"error"`` (default) or
    ``"pool"`` (use this group's pooled within-stratum residual variance there).
    """
    z = _z(level)
    w = _default_weights(sums.n) if weights is None else _check_weights(weights, sums.n_strata)
    r, var, mean_y, mean_x = _ratio_parts(sums, w, singleton)
    se = math.sqrt(var)
    return GroupRatio(r, se, r - z * se, r + z * se, level, mean_y, mean_x)


def ratio_effect(
    treated: RatioSums,
    control: RatioSums,
    weights=None,
    level: float = 0.95,
    singleton: str = "error",
) -> RatioEffect:
    """Effect of treatment on a ratio outcome: R_1 - R_0 and the relative lift R_1 / R_0 - 1.

    ``weights`` default to the ATT stratum weights w_s = n_1s / n_1 taken from ``treated.n``; the
    same weights are applied to both groups. Intervals use the normal critical value for ``level``.
    The lift interval is formed on the log scale, log(R_1 / R_0) +/- z * sqrt(v_1 / R_1^2 + v_0 / R_0^2)
    (delta method), then mapped back; it is NaN unless both ratios are positive.
    """
    if treated.n_strata != control.n_strata:
        raise ValueError("treated and control sums must cover the same strata")
    z = _z(level)
    w = _default_weights(treated.n) if weights is None else _check_weights(weights, treated.n_strata)
    r1, v1, my1, mx1 = _ratio_parts(treated, w, singleton)
    r0, v0, my0, mx0 = _ratio_parts(control, w, singleton)
    se1, se0 = math.sqrt(v1), math.sqrt(v0)
    g1 = GroupRatio(r1, se1, r1 - z * se1, r1 + z * se1, level, my1, mx1)
    g0 = GroupRatio(r0, se0, r0 - z * se0, r0 + z * se0, level, my0, mx0)

    # Independent groups: variances add.
    diff = r1 - r0
    se = math.sqrt(v1 + v0)

    nan = float("nan")
    if r0 != 0.0:
        rho = r1 / r0
        lift = rho - 1.0
    else:
        rho = lift = nan
    if r1 > 0.0 and r0 > 0.0:
        # Delta method for a ratio of independent estimates: Var(log(R_1/R_0)) ~= v_1/R_1^2 + v_0/R_0^2.
        log_se = math.sqrt(v1 / (r1 * r1) + v0 / (r0 * r0))
        lift_se = rho * log_se
        lift_lo, lift_hi = (b - 1.0 for b in log_ratio_interval(rho, log_se, level))
    else:
        lift_se = lift_lo = lift_hi = nan
    return RatioEffect(
        estimate=diff,
        std_error=se,
        ci_low=diff - z * se,
        ci_high=diff + z * se,
        level=level,
        treated=g1,
        control=g0,
        lift=lift,
        lift_std_error=lift_se,
        lift_ci_low=lift_lo,
        lift_ci_high=lift_hi,
    )
