"""Regression adjustment within strata: the stratified effect on the treated with each unit's
outcome adjusted by a common within-cell slope on the numeric features (covariance adjustment
of a matched sample: Rubin 1973, Biometrics 29:185; Cochran & Rubin 1973, Sankhya A 35:417).

Per stratum s and group g the warehouse returns n, sum x (p), sum x x' (p x p), sum y, sum y^2
and sum x y. With cells c = (s, g), the slope is the analysis-of-covariance estimate of
y = alpha_c + gamma' x + e (a separate intercept for every cell):

    gamma = (sum_c S_xx,c)^-1 sum_c S_xy,c,    S_xx,c = sum x x' - n xbar xbar',  S_xy,c likewise

and the adjusted outcome u = y - gamma' x has per-cell sums sum u = sum y - gamma' sum x and
sum u^2 = sum y^2 - 2 gamma' sum x y + gamma' (sum x x') gamma. The effect and its variance are
then those of the plain subclassification estimator (att.py) applied to u:

    tau = sum_s w_s [(ybar_1s - ybar_0s) - gamma' (xbar_1s - xbar_0s)],   w_s = n_1s / n_1
    V   = sum_s w_s^2 (s2_u,1s / n_1s + s2_u,0s / n_0s)

With one stratum, tau is the coefficient of treatment in the least-squares fit of y on 1,
treatment and x. V treats gamma as known: its estimation error adds terms of order p / n, small
when the cells are large (the same plug-in as for regression-adjusted experiments, Lin 2013,
Annals of Applied Statistics 7:295). Strata without units of both groups are left out, as in
att.py. Columns that do not vary within cells (or are collinear) get no slope.

Each group's own slopes (`slopes="group"`, [effect] adjustment_slopes = "group"; the default is
"common", since with them the commuter fares' SE came out too small): the
regression adjustment of a stratified comparison with a separate regression in each group and
one intercept per stratum, the subclassification-with-regression estimator (Imbens & Rubin 2015,
ch. 12.4 and 17.7, model-based imputation within subclasses; separate slopes per arm as in Lin
2013, whose interacted regression is the same fit). In group g,

    gamma_g = (sum_s S_zz,gs)^-1 sum_s S_zy,gs,

the regressors z are the numeric features (and, [effect] adjustment_terms = "squares", their
squares); each group's stratum mean is predicted at the estimand's target mean zt_s of the stratum
(xbar_1s for the ATT, xbar_0s for the ATC, the stratum's pooled mean for the ATE):

    mu_gs = ybar_gs + gamma_g' (zt_s - zbar_gs),    tau = sum_s w_s (mu_1s - mu_0s)

with the estimand's stratum weights (att.stratum_weights). For the ATT mu_1s = ybar_1s and
tau = sum_s w_s [(ybar_1s - ybar_0s) - gamma_0'(zbar_1s - zbar_0s)]. Each is the average over the
target units of that group's least-squares prediction, so the statsmodels fit of y on stratum
dummies and z in each group reproduces it.

Variance, given the units' features (the target means zt_s held fixed):

    V = sum_g [ sum_s w_s^2 s2_{u,gs} / n_gs  +  d_g' Var(gamma_g) d_g ],
    u = y - gamma_g' z (group g's residuals),   d_g = sum_s w_s (zt_s - zbar_gs),
    Var(gamma_g) = sigma2_g (sum_s S_zz,gs)^-1,  sigma2_g = SSR_g / (n_g - k_g - q_g),

the variance of a least-squares prediction (the first term the plug-in with slopes held fixed,
per stratum; the second the slopes' estimation error under a common residual variance in the
group, the homoskedastic OLS formula). Left out: the variation of the target means themselves (a
population estimand's share, sum_s w_s^2 (gamma_1 - gamma_0)' Var(zbar_ts) (gamma_1 - gamma_0)),
heteroskedasticity in the slopes' term, and the correlation between a group's slopes and the
common slope when only one group falls back to it (below). Measured on the commuter simulation's
lognormal fares (benchmarks/RESULTS_calibration_adjustment_groups.md) the standard error is then
too small, SE/SD 0.73-0.85: a heteroskedasticity-robust slopes' term needs per-unit residuals,
i.e. a second aggregate query at the fitted slopes (not done).

A group with too few units for slopes of its own (fewer than MIN_UNITS_PER_SLOPE units beyond its
strata per regressor, common practice: about ten observations per coefficient, recalled), or whose
regressors are collinear within its own cells, takes the common slope fitted on both groups (and
its residuals); `own_slopes` says which group had its own. When both fall back the two slope terms
are one, d = d_1 - d_0.

Ratio outcomes (adjusted_ratio): numerator and denominator are adjusted as two outcomes with the
same slopes' decisions, R_g = sum_s w_s mu^num_gs / sum_s w_s mu^den_gs, and the variance is the
delta method's (ratio.py's combined ratio, Cochran 1977 §6.11): the same V applied to the
linearised outcome e = num - R_g den (whose slopes are gamma^num - R_g gamma^den, least squares
being linear in y), divided by (sum_s w_s mu^den_gs)^2.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

import math

from sqlmatch.estimators.att import StratifiedEstimate, StratumMoments, relative_lift, stratified_att, stratum_weights
from sqlmatch.estimators.intervals import normal_interval

__all__ = ["CellSums", "AdjustedEstimate", "AdjustedRatio", "adjusted_att", "adjusted_ratio", "MIN_UNITS_PER_SLOPE", "SLOPES"]

SLOPES = ("group", "common")
MIN_UNITS_PER_SLOPE = 10


@dataclass(frozen=True, eq=False)
class CellSums:
    """One group's sums per stratum: n (k), sum_x (k x p), sum_xx (k x p x p), sum_y, sum_yy, sum_xy (k x p)."""

    n: np.ndarray
    sum_x: np.ndarray
    sum_xx: np.ndarray
    sum_y: np.ndarray
    sum_yy: np.ndarray
    sum_xy: np.ndarray

    @classmethod
    def of(cls, n, sum_x, sum_xx, sum_y, sum_yy, sum_xy) -> "CellSums":
        arrays = [np.asarray(a, dtype=float) for a in (n, sum_x, sum_xx, sum_y, sum_yy, sum_xy)]
        k = arrays[0].shape[0]
        p = arrays[1].shape[1] if arrays[1].ndim == 2 else 0
        shapes = [(k,), (k, p), (k, p, p), (k,), (k,), (k, p)]
        for a, shape, name in zip(arrays, shapes, ("n", "sum_x", "sum_xx", "sum_y", "sum_yy", "sum_xy")):
            if a.shape != shape:
                raise ValueError(f"{name} has shape {a.shape}, expected {shape}")
            if not np.all(np.isfinite(a)):
                raise ValueError(f"{name} contains missing or infinite values")
        return cls(*arrays)

    def centred(self) -> tuple[np.ndarray, np.ndarray]:
        """sum over cells with units of S_xx,c and S_xy,c."""
        keep = self.n > 0
        n = self.n[keep][:, None]
        sx, sy = self.sum_x[keep], self.sum_y[keep][:, None]
        sxx = self.sum_xx[keep] - np.einsum("ki,kj->kij", sx, sx) / n[:, :, None]
        sxy = self.sum_xy[keep] - sx * sy / n
        return sxx.sum(axis=0), sxy.sum(axis=0)

    def adjusted(self, gamma: np.ndarray) -> StratumMoments:
        total = self.sum_y - self.sum_x @ gamma
        total_sq = self.sum_yy - 2.0 * self.sum_xy @ gamma + np.einsum("i,kij,j->k", gamma, self.sum_xx, gamma)
        return StratumMoments.of(self.n, total, np.maximum(total_sq, 0.0))


def _kept(sxx: np.ndarray, candidates, tol: float) -> list[int]:
    """Columns with within-cell variation that are not linear combinations of earlier ones."""
    scale = np.sqrt(np.clip(np.diag(sxx), 0.0, None))
    keep: list[int] = []
    for j in candidates:
        if scale[j] <= 0:
            continue
        trial = keep + [j]
        corr = sxx[np.ix_(trial, trial)] / np.outer(scale[trial], scale[trial])
        try:
            if np.linalg.cholesky(corr)[-1, -1] ** 2 > tol:
                keep.append(j)
        except np.linalg.LinAlgError:
            continue
    return keep


def _subset(cells: CellSums, rows) -> CellSums:
    return CellSums(*(getattr(cells, f)[rows] for f in ("n", "sum_x", "sum_xx", "sum_y", "sum_yy", "sum_xy")))


@dataclass(frozen=True)
class _Fit:
    gamma: np.ndarray  # q, 0 where no slope
    cov: np.ndarray  # q x q, Var(gamma) = sigma2 (sum S_zz)^-1 on the kept columns


def _fit(groups: list[CellSums], keep: list[int]) -> _Fit:
    """Least squares of y on z with one intercept per cell over the given groups' cells."""
    q = groups[0].sum_x.shape[1]
    sxx, sxy = np.zeros((q, q)), np.zeros(q)
    syy, n, cells = 0.0, 0.0, 0
    for g in groups:
        a, b = g.centred()
        sxx, sxy = sxx + a, sxy + b
        used = g.n > 0
        syy += float(np.sum(g.sum_yy[used] - g.sum_y[used] ** 2 / g.n[used]))
        n += float(g.n[used].sum())
        cells += int(used.sum())
    gamma, cov = np.zeros(q), np.zeros((q, q))
    if keep:
        kk = np.ix_(keep, keep)
        inv = np.linalg.inv(sxx[kk])
        gamma[keep] = inv @ sxy[keep]
        df = n - cells - len(keep)
        ssr = max(syy - float(sxy[keep] @ gamma[keep]), 0.0)
        cov[kk] = (ssr / df if df > 0 else math.nan) * inv
    return _Fit(gamma, cov)


def _predicted(cells: CellSums, fit: _Fit, target: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, float, np.ndarray]:
    """Per stratum mu_s = ybar_s + gamma'(zt_s - zbar_s), the residuals' part of the variance of
    sum_s w_s mu_s (sum_s w_s^2 s2_u,s / n_s) and d = sum_s w_s (zt_s - zbar_s)."""
    zbar = cells.sum_x / cells.n[:, None]
    mu = cells.sum_y / cells.n + (target - zbar) @ fit.gamma
    u = cells.adjusted(fit.gamma)
    var = float(np.sum(w**2 * u.variance() / cells.n))
    d = w @ (target - zbar)
    return mu, var, d


@dataclass(frozen=True)
class _Design:
    """What both the outcome and (for a ratio) its linearisation share: strata, weights, targets, the
    kept columns and which group has its own slopes."""

    both: np.ndarray
    w: np.ndarray
    target: np.ndarray
    keep: list
    own: tuple  # (treated, control)


def _design(treated: CellSums, control: CellSums, tol: float, estimand: str, min_units: int) -> _Design:
    both = (treated.n > 0) & (control.n > 0)
    t, c = _subset(treated, both), _subset(control, both)
    sxx = t.centred()[0] + c.centred()[0]
    keep = _kept(sxx, range(sxx.shape[0]), tol)
    w = stratum_weights(t.n, c.n, estimand)
    zt, zc = t.sum_x / t.n[:, None], c.sum_x / c.n[:, None]
    target = {"att": zt, "atc": zc, "ate": (t.sum_x + c.sum_x) / (t.n + c.n)[:, None]}[estimand]
    own = []
    for g in (t, c):
        room = g.n.sum() - len(g.n)  # units beyond one per stratum (its intercepts)
        own.append(bool(keep) and room >= min_units * len(keep) and _kept(g.centred()[0], keep, tol) == keep)
    return _Design(both, w, target, keep, tuple(own))


def _group_effect(design: _Design, treated: CellSums, control: CellSums):
    """Per group: mu (per stratum), the variance of its weighted mean; the slopes' cross term."""
    t, c = _subset(treated, design.both), _subset(control, design.both)
    common = _fit([t, c], design.keep) if not all(design.own) else None
    fits = [_fit([g], design.keep) if own else common for g, own in zip((t, c), design.own)]
    out, ds = [], []
    for g, fit in zip((t, c), fits):
        mu, var, d = _predicted(g, fit, design.target, design.w)
        out.append((mu, var + float(d @ fit.cov @ d), fit.gamma))
        ds.append(d)
    cross = -2.0 * float(ds[0] @ common.cov @ ds[1]) if common is not None and not any(design.own) else 0.0
    return out[0], out[1], cross


@dataclass(frozen=True)
class AdjustedEstimate:
    effect: StratifiedEstimate
    slopes: np.ndarray  # gamma, one per column (0 for a column given no slope); with group slopes the controls' (gamma_0)
    adjusted_for: tuple[str, ...]  # the columns that got a slope
    slopes_treated: np.ndarray | None = None  # gamma_1 (group slopes)
    own_slopes: tuple[bool, bool] = (False, False)  # (treated, control) fitted their own slopes


def adjusted_att(
    treated: CellSums, control: CellSums, names, tol: float = 1e-10, estimand: str = "att", slopes: str = "group", min_units_per_slope: int = MIN_UNITS_PER_SLOPE,
) -> AdjustedEstimate:
    """The regression-adjusted stratified effect of the estimand (see the module's docstring):
    `slopes="group"` each group's own slopes, predictions at the target means; "common" one slope."""
    if slopes not in SLOPES:
        raise ValueError(f"slopes must be one of {SLOPES}, got {slopes!r}")
    names = tuple(names)
    if slopes == "group":
        design = _design(treated, control, tol, estimand, min_units_per_slope)
        (mu1, v1, g1), (mu0, v0, g0), cross = _group_effect(design, treated, control)
        w = design.w
        tau = float(np.sum(w * (mu1 - mu0)))
        var = v1 + v0 + cross
        se = math.sqrt(var) if math.isfinite(var) and var >= 0 else None
        lo, hi = normal_interval(tau, se)
        n1, n0 = treated.n[design.both], control.n[design.both]
        effect = StratifiedEstimate(
            estimate=tau, std_error=se, ci_low=lo, ci_high=hi, n_treated=int(n1.sum()), n_control=int(n0.sum()), n_strata=int(design.both.sum()),
            mean_treated=float(np.sum(w * mu1)), mean_control=float(np.sum(w * mu0)), var_mean_treated=v1, var_mean_control=v0,
        )
        return AdjustedEstimate(effect=effect, slopes=g0, adjusted_for=tuple(names[j] for j in design.keep), slopes_treated=g1, own_slopes=design.own)
    both = (treated.n > 0) & (control.n > 0)  # the strata the estimate uses
    t, c = _subset(treated, both), _subset(control, both)
    sxx_t, sxy_t = t.centred()
    sxx_c, sxy_c = c.centred()
    sxx, sxy = sxx_t + sxx_c, sxy_t + sxy_c
    keep = _kept(sxx, range(len(names)), tol)
    gamma = np.zeros(len(names))
    if keep:
        gamma[keep] = np.linalg.solve(sxx[np.ix_(keep, keep)], sxy[keep])
    effect = stratified_att(t.adjusted(gamma), c.adjusted(gamma), estimand=estimand)
    return AdjustedEstimate(effect=effect, slopes=gamma, adjusted_for=tuple(names[j] for j in keep))


@dataclass(frozen=True)
class AdjustedRatio:
    estimate: float  # R_1 - R_0
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    ratio_treated: float
    ratio_control: float
    var_treated: float  # Var(R_1), delta method
    var_control: float
    lift: float
    lift_std_error: float | None
    lift_ci_low: float | None
    lift_ci_high: float | None
    adjusted_for: tuple[str, ...]
    own_slopes: tuple[bool, bool]


def _linearised(num: CellSums, den: CellSums, num_den: np.ndarray, r: float) -> CellSums:
    """The per-cell sums of e = num - r den (least squares being linear in y, e's slopes are
    gamma^num - r gamma^den)."""
    return CellSums(
        num.n, num.sum_x, num.sum_xx, num.sum_y - r * den.sum_y, num.sum_yy - 2.0 * r * num_den + r * r * den.sum_yy, num.sum_xy - r * den.sum_xy,
    )


def adjusted_ratio(treated, control, names, tol: float = 1e-10, estimand: str = "att", min_units_per_slope: int = MIN_UNITS_PER_SLOPE) -> AdjustedRatio:
    """A ratio outcome (sum num / sum den per group) adjusted with each group's own slopes: both
    parts predicted at the target means, their ratio, and the delta-method variance (module
    docstring). `treated`, `control`: (num CellSums, den CellSums, per-stratum sum num * den)."""
    names = tuple(names)
    (tn, td, tnd), (cn, cd, cnd) = treated, control
    design = _design(tn, cn, tol, estimand, min_units_per_slope)
    (mn1, _, _), (mn0, _, _), _ = _group_effect(design, tn, cn)
    (md1, _, _), (md0, _, _), _ = _group_effect(design, td, cd)
    w = design.w
    den1, den0 = float(w @ md1), float(w @ md0)
    r1, r0 = float(w @ mn1) / den1, float(w @ mn0) / den0
    # variance of each group's adjusted mean of e = num - R_g den, over its mean denominator squared
    (_, ve1, _), (_, ve0, _), cross = _group_effect(design, _linearised(tn, td, tnd, r1), _linearised(cn, cd, cnd, r0))
    v1, v0 = ve1 / den1**2, ve0 / den0**2
    # both groups on the common slope: the shared slopes' cross term, -2 d_1' Var(gamma) d_0, on e
    # (whose R differs by group; the common fit here is of e at each group's own R, an approximation)
    var = v1 + v0 + (cross / (den1 * den0) if cross else 0.0)
    se = math.sqrt(var) if math.isfinite(var) and var >= 0 else None
    lo, hi = normal_interval(r1 - r0, se)
    try:
        lift = relative_lift(r1, v1, r0, v0)
    except OverflowError:  # a variance so large its log-scale interval leaves the doubles: no interval
        lift = relative_lift(r1, math.nan, r0, math.nan)
    return AdjustedRatio(
        estimate=r1 - r0, std_error=se, ci_low=lo, ci_high=hi, ratio_treated=r1, ratio_control=r0, var_treated=v1, var_control=v0,
        lift=lift.estimate, lift_std_error=lift.std_error, lift_ci_low=lift.ci_low, lift_ci_high=lift.ci_high,
        adjusted_for=tuple(names[j] for j in design.keep), own_slopes=design.own,
    )
