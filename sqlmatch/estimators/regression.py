"""Weighted least squares from its sufficient statistics: X'WX, X'Wy and y'Wy (never rows).

    beta    = (X'WX)^-1 X'Wy
    RSS     = y'Wy - beta' X'Wy                  (the weighted residual sum of squares)
    sigma^2 = RSS / (n - p)
    Cov     = sigma^2 (X'WX)^-1,   t_j = beta_j / sqrt(Cov_jj),   df = n - p

(weighted least squares with the scale estimated from the residuals: Greene 2012, *Econometric
Analysis*, 7th ed., ch. 9 - chapter recalled). The weights are analytic weights: they set each
row's relative precision and the error scale is estimated, which is also what statsmodels' WLS
does; n counts rows with positive weight, so frequency weights would give a different df.

Columns that are (numerically) linear combinations of earlier columns are dropped before solving,
found by a Cholesky factorisation of the correlation-scaled X'WX that skips any column whose
remaining variance is below `tol`; p counts the columns kept. Centring the columns in SQL
(subtracting constants) keeps the sums well conditioned and changes nothing but the intercept;
`uncentred_intercept` recovers the intercept of the raw columns.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

__all__ = ["WLSFit", "wls_from_moments", "uncentred_intercept"]


@dataclass(frozen=True)
class WLSFit:
    names: tuple[str, ...]  # the columns kept, in order
    dropped: tuple[str, ...]  # columns dropped as collinear with earlier ones
    beta: np.ndarray
    std_error: np.ndarray
    t_stat: np.ndarray
    n: int
    p: int
    df: int
    rss: float
    sigma2: float

    def coef(self, name: str) -> float:
        return float(self.beta[self.names.index(name)])

    def se(self, name: str) -> float:
        return float(self.std_error[self.names.index(name)])

    def t(self, name: str) -> float:
        return float(self.t_stat[self.names.index(name)])


def _kept_columns(xtx: np.ndarray, tol: float) -> list[int]:
    """Indices of columns that are not linear combinations of the columns before them."""
    d = np.sqrt(np.clip(np.diag(xtx), 0.0, None))
    keep: list[int] = []
    for j in range(xtx.shape[0]):
        if d[j] <= 0:
            continue
        trial = keep + [j]
        s = xtx[np.ix_(trial, trial)] / np.outer(d[trial], d[trial])
        try:
            chol = np.linalg.cholesky(s)
        except np.linalg.LinAlgError:
            continue
        if chol[-1, -1] ** 2 > tol:  # share of column j's variance not explained by the kept columns
            keep.append(j)
    return keep


def wls_from_moments(xtx, xty, yty: float, n: int, names, tol: float = 1e-10) -> WLSFit:
    """WLS coefficients, standard errors and t-statistics from X'WX (p x p), X'Wy (p) and y'Wy."""
    xtx = np.asarray(xtx, dtype=float)
    xty = np.asarray(xty, dtype=float)
    names = tuple(names)
    if xtx.shape != (len(names), len(names)) or xty.shape != (len(names),):
        raise ValueError("X'WX must be p x p and X'Wy of length p, p = number of names")
    if not (np.all(np.isfinite(xtx)) and np.all(np.isfinite(xty)) and math.isfinite(yty)):
        raise ValueError("the regression sums contain missing or infinite values")
    keep = _kept_columns(xtx, tol)
    a = xtx[np.ix_(keep, keep)]
    b = xty[keep]
    p = len(keep)
    n = int(n)
    if n - p < 1:
        raise ValueError(f"{n} rows cannot fit {p} coefficients with a residual degree of freedom left")
    # Solve on the correlation scale (D^-1 A D^-1, D = sqrt(diag A)) for accuracy, then scale back.
    d = np.sqrt(np.diag(a))
    inv = np.linalg.inv(a / np.outer(d, d)) / np.outer(d, d)
    beta = np.linalg.solve(a / np.outer(d, d), b / d) / d
    rss = max(float(yty - beta @ b), 0.0)
    sigma2 = rss / (n - p)
    se = np.sqrt(np.clip(np.diag(inv), 0.0, None) * sigma2)
    with np.errstate(divide="ignore", invalid="ignore"):
        t = beta / se
    return WLSFit(
        names=tuple(names[k] for k in keep),
        dropped=tuple(names[k] for k in range(len(names)) if k not in keep),
        beta=beta,
        std_error=se,
        t_stat=t,
        n=n,
        p=p,
        df=n - p,
        rss=rss,
        sigma2=sigma2,
    )


def uncentred_intercept(fit: WLSFit, intercept: str, y_centre: float, centres: dict[str, float]) -> float:
    """Intercept of the regression on the raw columns, from a fit on centred columns:
    b0 = b0_c + c_y - sum_j b_j c_j (the slopes are unchanged by centring)."""
    b0 = fit.coef(intercept) + y_centre
    for name, c in centres.items():
        if name in fit.names:
            b0 -= fit.coef(name) * c
    return b0
