"""The Abadie & Imbens (2006, Econometrica 74(1):235-267, section 4, recalled from memory) variance
of the nearest-neighbour matching estimator of the effect on the treated, conditional on the
features (the effect on the treated given their features, as the stratified variance targets):

    V = (1 / N_1^2) sum_i (W_i - (1 - W_i) K_M(i) / M)^2 sigma2(X_i, W_i)

K_M(i) the number of times control i is used, M the matches per treated unit (a control's summed
matching weight is K_M(i) / M, so the factor is the squared weight, 1 for a treated unit), and
sigma2 estimated by matching within the unit's group: sigma2_i = J / (J + 1) (y_i - mean of its J
nearest same-group units)^2, J = 1 here. Treated and control parts are returned separately (they
are independent given the features), so a lift can use them as it uses the stratified ones.

A ratio outcome R = sum y / sum x per group is linearised: u_i = (y_i - R x_i) / xbar, whose
neighbour difference is (dy - R dx) / xbar, so sum w^2 du^2 / 2 = (S_yy - 2 R S_xy + R^2 S_xx) / xbar^2
from the three cross-product sums the SQL returns.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from sqlmatch.engines.base import QueryResult


@dataclass(frozen=True)
class MatchingVariance:
    var_treated: float  # (1 / N_1^2) sum over matched treated of sigma2_i
    var_control: float  # (1 / N_1^2) sum over matched controls of w_i^2 sigma2_i
    n_treated: float  # N_1, the matched treated units
    units_without_neighbour: int  # units alone in their group and block (they borrow the mean sigma2)

    @property
    def variance(self) -> float:
        return self.var_treated + self.var_control

    @property
    def std_error(self) -> float:
        return math.sqrt(self.variance) if math.isfinite(self.variance) and self.variance >= 0 else math.nan


def _f(x) -> float:
    return math.nan if x is None else float(x)


def _weighted_sum(row: dict, key: str) -> float:
    """sum_i w_i^2 sigma2_i over the group's matched units; units without a neighbour borrow the
    mean sigma2 of those with one."""
    total = _f(row.get(f"{key}__w2_dd"))
    missing = _f(row["sum_w2"]) - _f(row["sum_w2_with_neighbour"])
    n_with = _f(row["n_with_neighbour"])
    if missing > 0:
        total += missing * (_f(row.get(f"{key}__dd")) / n_with if n_with > 0 else math.nan)
    return total


def _ratio_sum(row: dict, key: str, ratio: float, xbar: float) -> float:
    s = [_weighted_sum(row, f"{key}__{p}") for p in ("yy", "xy", "xx")]
    return (s[0] - 2.0 * ratio * s[1] + ratio * ratio * s[2]) / (xbar * xbar)


def matching_variance(result: QueryResult, key: str, ratios: tuple[float, float] | None = None, xbars: tuple[float, float] | None = None) -> MatchingVariance:
    """From the `matching_variance` step's two rows: `key` an outcome name (or `<outcome>__did`);
    a ratio outcome passes (R_treated, R_control) and the weighted mean denominators (xbar_T, xbar_C)."""
    rows = {int(r["treated"]): r for r in result.records()}
    t, c = rows.get(1), rows.get(0)
    if t is None or c is None:
        return MatchingVariance(math.nan, math.nan, 0.0, 0)
    n1 = _f(t["sum_w"])
    if ratios is None:
        s1, s0 = _weighted_sum(t, key), _weighted_sum(c, key)
    else:
        s1, s0 = _ratio_sum(t, key, ratios[0], xbars[0]), _ratio_sum(c, key, ratios[1], xbars[1])
    alone = int(_f(t["n_units"]) - _f(t["n_with_neighbour"]) + _f(c["n_units"]) - _f(c["n_with_neighbour"]))
    return MatchingVariance(s1 / (n1 * n1), s0 / (n1 * n1), n1, alone)


def control_mean_shift(result: QueryResult, number: int, n_features: int) -> float:
    """The Abadie & Imbens (2011, Journal of Business & Economic Statistics 29(1):1-11, recalled)
    bias correction of the matched controls' mean of quantity `number` (1-based, as in
    nn_variance.variables): beta' (xbar_T - xbar_C), beta the slopes of the controls' regression
    of the quantity on the features, weighted by the matching weights (K_M / M), from the sums
    of the `bias_sums` step. Adding it to the control mean turns the matching estimator into
    (1 / N_1) sum_i [(Y_i - Yhat_i(0)) - (mu0(X_i) - mean of mu0 over i's matches)] with a linear mu0.
    NaN when the regression cannot be fitted."""
    import numpy as np

    rows = {int(r["treated"]): r for r in result.records()}
    t, c = rows.get(1), rows.get(0)
    if t is None or c is None or not _f(c["sum_w"]) > 0 or not _f(t["sum_w"]) > 0:
        return math.nan
    p = n_features
    sw = _f(c["sum_w"])
    sx = np.array([_f(c[f"x{j}"]) for j in range(1, p + 1)])
    sxx = np.empty((p, p))
    for j in range(1, p + 1):
        for k in range(j, p + 1):
            sxx[j - 1, k - 1] = sxx[k - 1, j - 1] = _f(c[f"x{j}_x{k}"])
    sv = _f(c[f"v{number}"])
    sxv = np.array([_f(c[f"x{j}_v{number}"]) for j in range(1, p + 1)])
    xbar_c = sx / sw
    cxx = sxx - sw * np.outer(xbar_c, xbar_c)  # centred cross-products
    cxv = sxv - sw * xbar_c * (sv / sw)
    if not (np.all(np.isfinite(cxx)) and np.all(np.isfinite(cxv))):
        return math.nan
    beta, *_ = np.linalg.lstsq(cxx, cxv, rcond=None)
    xbar_t = np.array([_f(t[f"x{j}"]) for j in range(1, p + 1)]) / _f(t["sum_w"])
    return float(beta @ (xbar_t - xbar_c))
