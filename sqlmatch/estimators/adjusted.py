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
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from sqlmatch.estimators.att import StratifiedEstimate, StratumMoments, stratified_att

__all__ = ["CellSums", "AdjustedEstimate", "adjusted_att"]


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


@dataclass(frozen=True)
class AdjustedEstimate:
    effect: StratifiedEstimate
    slopes: np.ndarray  # gamma, one per column (0 for a column given no slope)
    adjusted_for: tuple[str, ...]  # the columns that got a slope


def adjusted_att(treated: CellSums, control: CellSums, names, tol: float = 1e-10, estimand: str = "att") -> AdjustedEstimate:
    names = tuple(names)
    both = (treated.n > 0) & (control.n > 0)  # the strata the estimate uses
    sub = lambda c: CellSums(*(getattr(c, f)[both] for f in ("n", "sum_x", "sum_xx", "sum_y", "sum_yy", "sum_xy")))  # noqa: E731
    t, c = sub(treated), sub(control)
    sxx_t, sxy_t = t.centred()
    sxx_c, sxy_c = c.centred()
    sxx, sxy = sxx_t + sxx_c, sxy_t + sxy_c
    # keep columns with within-cell variation that are not linear combinations of earlier ones
    scale = np.sqrt(np.clip(np.diag(sxx), 0.0, None))
    keep: list[int] = []
    for j in range(len(names)):
        if scale[j] <= 0:
            continue
        trial = keep + [j]
        corr = sxx[np.ix_(trial, trial)] / np.outer(scale[trial], scale[trial])
        try:
            if np.linalg.cholesky(corr)[-1, -1] ** 2 > tol:
                keep.append(j)
        except np.linalg.LinAlgError:
            continue
    gamma = np.zeros(len(names))
    if keep:
        gamma[keep] = np.linalg.solve(sxx[np.ix_(keep, keep)], sxy[keep])
    effect = stratified_att(t.adjusted(gamma), c.adjusted(gamma), estimand=estimand)
    return AdjustedEstimate(effect=effect, slopes=gamma, adjusted_for=tuple(names[j] for j in keep))
