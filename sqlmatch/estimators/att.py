"""Effect from per-stratum outcome aggregates (no row-level data).

Subclassification estimator and its variance (Imbens & Rubin 2015, Causal Inference for
Statistics, Social, and Biomedical Sciences, ch. 17):
    tau = sum_s w_s (ybar_1s - ybar_0s)
    V   = sum_s w_s^2 (s2_1s / n_1s + s2_0s / n_0s)
with the stratum weights of the estimand: w_s = n_1s / n_1 for the effect on the treated (ATT),
n_0s / n_0 on the controls (ATC), n_s / n for everyone in the matched strata (ATE).
With one stratum it is the difference in means with the unpooled (Welch) variance.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from sqlmatch.estimators.intervals import critical_value, log_ratio_interval, normal_interval


@dataclass(frozen=True)
class StratumMoments:
    """Per-stratum count, sum and sum of squares of an outcome, for one group."""

    n: np.ndarray
    total: np.ndarray
    total_sq: np.ndarray

    @classmethod
    def of(cls, n, total, total_sq) -> "StratumMoments":
        return cls(np.asarray(n, dtype=float), np.asarray(total, dtype=float), np.asarray(total_sq, dtype=float))

    @property
    def mean(self) -> np.ndarray:
        with np.errstate(invalid="ignore", divide="ignore"):
            return self.total / self.n

    def variance(self) -> np.ndarray:
        """Sample variance per stratum (n-1 denominator).

        A stratum with a single unit has no variance of its own; it borrows the pooled
        within-stratum variance of its group (strata with two or more units)."""
        n = self.n
        with np.errstate(invalid="ignore", divide="ignore"):
            ss = np.maximum(self.total_sq - self.total**2 / n, 0.0)
            var = np.where(n >= 2, ss / (n - 1), np.nan)
        ok = n >= 2
        if ok.any():
            pooled = ss[ok].sum() / (n[ok] - 1).sum()
            var = np.where(ok, var, pooled)
        return var


@dataclass(frozen=True)
class StratifiedEstimate:
    estimate: float
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    n_treated: int
    n_control: int
    n_strata: int
    mean_treated: float
    mean_control: float  # weighted to the treated's strata
    var_mean_treated: float = math.nan  # sum_s w_s^2 s2_1s / n_1s
    var_mean_control: float = math.nan  # sum_s w_s^2 s2_0s / n_0s


ESTIMANDS = ("att", "atc", "ate")


def stratum_weights(n_treated: np.ndarray, n_control: np.ndarray, estimand: str = "att") -> np.ndarray:
    """w_s of the estimand over the given strata (Imbens & Rubin 2015, ch. 17), summing to 1."""
    n1, n0 = np.asarray(n_treated, float), np.asarray(n_control, float)
    size = {"att": n1, "atc": n0, "ate": n1 + n0}[estimand]
    return size / size.sum()


def stratified_att(treated: StratumMoments, control: StratumMoments, level: float = 0.95, estimand: str = "att") -> StratifiedEstimate:
    """Subclassification effect (Imbens & Rubin 2015, ch. 17) from aligned per-stratum moments:
    on the treated by default, or the estimand's stratum weights (att, atc, ate)."""
    if treated.n.shape != control.n.shape:
        raise ValueError("treated and control moments must cover the same strata")
    keep = (treated.n > 0) & (control.n > 0)
    n1 = treated.n[keep].sum()
    w = stratum_weights(treated.n[keep], control.n[keep], estimand)
    m1, m0 = treated.mean[keep], control.mean[keep]
    tau = float(np.sum(w * (m1 - m0)))
    v1, v0 = treated.variance()[keep], control.variance()[keep]
    var1 = float(np.sum(w**2 * v1 / treated.n[keep]))
    var0 = float(np.sum(w**2 * v0 / control.n[keep]))
    var = var1 + var0
    se = math.sqrt(var) if math.isfinite(var) else None
    lo, hi = normal_interval(tau, se, level)
    return StratifiedEstimate(
        estimate=tau,
        std_error=se,
        ci_low=lo,
        ci_high=hi,
        n_treated=int(n1),
        n_control=int(control.n[keep].sum()),
        n_strata=int(keep.sum()),
        mean_treated=float(np.sum(w * m1)),
        mean_control=float(np.sum(w * m0)),
        var_mean_treated=var1,
        var_mean_control=var0,
    )


@dataclass(frozen=True)
class Lift:
    estimate: float  # m1 / m0 - 1 (= effect / m0)
    std_error: float | None  # delta method, on the lift scale
    ci_low: float | None
    ci_high: float | None
    scale: str  # "log": interval built for log(m1 / m0); "linear": for m1 / m0 itself


def relative_lift(mean_treated: float, var_treated: float, mean_control: float, var_control: float, level: float = 0.95) -> Lift:
    """Relative lift m1 / m0 - 1 of two independent group means, with a delta-method interval.

    Delta method for a ratio of independent estimates (e.g. Casella & Berger 2002, *Statistical
    Inference*, 2nd ed., §5.5.4 - section recalled):
        Var(log(m1/m0)) ~= v1 / m1^2 + v0 / m0^2,      Var(m1/m0) ~= (m1/m0)^2 (v1 / m1^2 + v0 / m0^2).
    When both means are positive the interval is built on the log scale and mapped back,
    exp(log(m1/m0) +/- z se_log) - 1, as ratio.py and binary.py do for their lifts; otherwise the
    linear interval m1/m0 - 1 +/- z sqrt(v1 / m0^2 + m1^2 v0 / m0^4). Undefined (NaN) when m0 = 0.
    """
    m1, m0, v1, v0 = float(mean_treated), float(mean_control), float(var_treated), float(var_control)
    nan = math.nan
    if m0 == 0.0 or not math.isfinite(m0) or not math.isfinite(m1):
        return Lift(nan, None, None, None, "linear")
    rho = m1 / m0
    z = critical_value(level)
    if not (math.isfinite(v1) and math.isfinite(v0)):
        return Lift(rho - 1.0, None, None, None, "linear")
    if m1 > 0.0 and m0 > 0.0:
        log_se = math.sqrt(v1 / (m1 * m1) + v0 / (m0 * m0))
        lo, hi = log_ratio_interval(rho, log_se, level)
        return Lift(rho - 1.0, rho * log_se, lo - 1.0, hi - 1.0, "log")
    se = math.sqrt(v1 / (m0 * m0) + m1 * m1 * v0 / m0**4)
    return Lift(rho - 1.0, se, rho - 1.0 - z * se, rho - 1.0 + z * se, "linear")


def lift_from_ratio_se(mean_treated: float, mean_control: float, ratio_se: float, level: float = 0.95) -> Lift:
    """Relative lift m1 / m0 - 1 when the standard error of the ratio rho = m1 / m0 is known from a
    variance that counts the dependence between the two means (matching with replacement: the
    Abadie-Imbens variance of the linearised difference (m1 - rho m0) / m0, delta method as in
    relative_lift). Log-scale interval when both means are positive, se_log = se(rho) / rho;
    otherwise the linear one. NaN lift when m0 = 0."""
    m1, m0 = float(mean_treated), float(mean_control)
    if m0 == 0.0 or not math.isfinite(m0) or not math.isfinite(m1):
        return Lift(math.nan, None, None, None, "linear")
    rho = m1 / m0
    se = float(ratio_se) if ratio_se is not None else math.nan
    if not math.isfinite(se) or se < 0:
        return Lift(rho - 1.0, None, None, None, "linear")
    if m1 > 0.0 and m0 > 0.0:
        lo, hi = log_ratio_interval(rho, se / rho, level)
        return Lift(rho - 1.0, se, lo - 1.0, hi - 1.0, "log")
    z = critical_value(level)
    return Lift(rho - 1.0, se, rho - 1.0 - z * se, rho - 1.0 + z * se, "linear")
