"""The Abadie & Imbens (2006, Econometrica 74(1):235-267, section 4, recalled from memory) variance
of the nearest-neighbour matching estimator of the effect on the treated, conditional on the
features (the effect on the treated given their features, as the stratified variance targets):

    V = (1 / N_1^2) sum_i (W_i - (1 - W_i) K_M(i) / M)^2 sigma2(X_i, W_i)

K_M(i) the number of times control i is used, M the matches per treated unit (a control's summed
matching weight is K_M(i) / M, so the factor is the squared weight, 1 for a treated unit), and
sigma2 estimated by matching within the unit's group: sigma2_i = J / (J + 1) (y_i - mean of its J
nearest same-group units)^2, J = 1 here, averaged over every unit as near as the nearest (units tied
on the score share the role; the SQL sums it per tie set). Treated and control parts are returned
separately; the relative lift takes the variance of its own linearised quantity instead (effects.py),
since the population form couples the two means.

A ratio outcome R = sum y / sum x per group is linearised: u_i = (y_i - R x_i) / xbar, whose
neighbour difference is (dy - R dx) / xbar, so sum w^2 du^2 / 2 = (S_yy - 2 R S_xy + R^2 S_xx) / xbar^2
from the cross-product sums the SQL returns. With the bias correction's regression, the
neighbour differences are those of the residual q - beta_g' x (beta_g the group's slopes of the
quantity on the features among its matched units): the neighbour is found on the score, and
subtracting the features' linear part keeps the gap in expected outcomes between a unit and a
neighbour with other features out of sigma2 (a choice of ours, not the paper's; the paper matches
on the features themselves).

The headline variance is the paper's variance of the estimator of the population effect on the
treated (Abadie & Imbens 2006, section 4; recalled from memory, theorem number not checked):

    V_pop = (1 / N_1^2) [ sum_{treated i} (Y_i - Yhat_i(0) - tau)^2
                          + sum_{controls j} (K_M(j) (K_M(j) - 1) / M^2) sigma2_j ],

Yhat_i(0) the mean of i's matches, bias-corrected by the controls' regression (Abadie & Imbens 2011,
recalled from memory, section not checked: the corrected estimator has the same asymptotic variance
and is estimated by the same formula with the corrected Yhat_i(0)). The formula can be checked by
hand: E (Y_i - Yhat_i(0) - tau)^2 = (tau(X_i) - tau)^2 + sigma2_1(X_i) + sum_j share_ij^2 sigma2_0(X_j). The treated units' squared matched differences hold, besides sigma2 of the
treated and (1 / M^2) sigma2 of each match, the spread of the effect across the treated units'
features and latent traits, which the conditional V above leaves out; the second sum adds the rest
of each reused control's w^2 sigma2. With tied controls sharing a treated unit's slots, K_M (K_M -
1) / M^2 is w_j^2 - sum_i share_ij^2, the exact form (share_ij the control's weight in treated unit
i's matched mean), which the variance step sums as `share2`. The treated part comes from the
pair_sums step: sums over the treated units of products of their own values t and their matches'
share-weighted means c, so sum_i a_i^2 with a_i = alpha' t_i - gamma' c_i is a quadratic form.
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
    population: float | None = None  # V_pop (the pair sums' form) when the run has its sums

    @property
    def conditional(self) -> float:
        return self.var_treated + self.var_control

    @property
    def variance(self) -> float:
        return self.population if self.population is not None else self.conditional

    @property
    def std_error(self) -> float:
        return math.sqrt(self.variance) if math.isfinite(self.variance) and self.variance >= 0 else math.nan


def _f(x) -> float:
    return math.nan if x is None else float(x)


def _weighted_sum(row: dict, key: str, weight: str = "w2") -> float:
    """sum_i w_i^2 d_a d_b / 2 over the group's matched units for product `key` (weight "s2": the
    controls' share2 in place of w^2); units without a neighbour borrow the mean of those with one."""
    total = _f(row.get(f"{key}__{weight}_dd"))
    missing = _f(row[f"sum_{weight}"]) - _f(row[f"sum_{weight}_with_neighbour"])
    n_with = _f(row["n_with_neighbour"])
    if missing > 0:
        total += missing * (_f(row.get(f"{key}__dd")) / n_with if n_with > 0 else math.nan)
    return total


def _quadratic(row: dict, coefs: dict[int, float], weight: str = "w2") -> float:
    """sum_i w_i^2 (sum_a c_a d_a,i)^2 / 2 from the product sums: the neighbour differences of a
    linear combination of the step's variables (numbers as in nn_variance.variables)."""
    total = 0.0
    for a, ca in coefs.items():
        for b, cb in coefs.items():
            if ca and cb:
                total += ca * cb * _weighted_sum(row, f"p{min(a, b)}_{max(a, b)}", weight)
    return total


def matched_difference_squares(pairs: dict, alpha: dict[int, float], gamma: dict[int, float]) -> tuple[float, float, float]:
    """(n, sum_i a_i, sum_i a_i^2) over the matched treated units, a_i = sum_k alpha_k t_k,i -
    sum_k gamma_k c_k,i (t: the unit's own values, c: its matches' share-weighted means; numbers as
    in nn_variance.variables), from the pair_sums row."""

    def cross(kind_a: str, a: int, kind_b: str, b: int) -> float:
        if a > b:
            a, b, kind_a, kind_b = b, a, kind_b, kind_a
        return _f(pairs[f"p{a}_{b}__{kind_a}{kind_b}"])

    n = _f(pairs["n_treated"])
    total = sum(c * _f(pairs[f"t{k}"]) for k, c in alpha.items() if c) - sum(c * _f(pairs[f"c{k}"]) for k, c in gamma.items() if c)
    square = 0.0
    for a, ca in alpha.items():
        for b, cb in alpha.items():
            if ca and cb:
                square += ca * cb * cross("t", a, "t", b)
        for b, gb in gamma.items():
            if ca and gb:
                square -= 2.0 * ca * gb * cross("t", a, "c", b)
    for a, ga in gamma.items():
        for b, gb in gamma.items():
            if ga and gb:
                square += ga * gb * cross("c", a, "c", b)
    return n, total, square


def regression_slopes(bias: QueryResult, group: int, number: int, n_features: int):
    """Slopes of the group's regression of quantity `number` on the features among its matched
    units, weighted by the matching weights, and the group's weighted feature means, from the
    bias_sums step; None when they cannot be computed."""
    import numpy as np

    row = {int(r["treated"]): r for r in bias.records()}.get(group)
    if row is None or not _f(row["sum_w"]) > 0:
        return None
    p = n_features
    sw = _f(row["sum_w"])
    sx = np.array([_f(row[f"x{j}"]) for j in range(1, p + 1)])
    sxx = np.empty((p, p))
    for j in range(1, p + 1):
        for k in range(j, p + 1):
            sxx[j - 1, k - 1] = sxx[k - 1, j - 1] = _f(row[f"x{j}_x{k}"])
    sv = _f(row[f"v{number}"])
    sxv = np.array([_f(row[f"x{j}_v{number}"]) for j in range(1, p + 1)])
    xbar = sx / sw
    cxx = sxx - sw * np.outer(xbar, xbar)  # centred cross-products
    cxv = sxv - sw * xbar * (sv / sw)
    if not (np.all(np.isfinite(cxx)) and np.all(np.isfinite(cxv))):
        return None
    beta, *_ = np.linalg.lstsq(cxx, cxv, rcond=None)
    return beta, xbar


def control_mean_shift(bias: QueryResult, number: int, n_features: int) -> float:
    """The Abadie & Imbens (2011, Journal of Business & Economic Statistics 29(1):1-11, recalled)
    bias correction of the matched controls' mean of quantity `number`: beta_C' (xbar_T - xbar_C),
    beta_C the slopes of the matched controls' regression on the features weighted by K_M / M.
    Adding it to the control mean turns the matching estimator into (1 / N_1) sum_i [(Y_i -
    Yhat_i(0)) - (mu0(X_i) - mean of mu0 over i's matches)] with a linear mu0. NaN when the
    regression cannot be fitted."""
    c, t = regression_slopes(bias, 0, number, n_features), regression_slopes(bias, 1, number, n_features)
    if c is None or t is None:
        return math.nan
    return float(c[0] @ (t[1] - c[1]))


def matching_variance(
    result: QueryResult,
    coefs: dict[int, dict[int, float]],
    residual: dict[int, dict[int, float]] | None = None,
    pairs: QueryResult | None = None,
    correction: dict[int, float] | None = None,
) -> MatchingVariance:
    """From the `matching_variance` step's two rows. `coefs[g]`: the quantity whose variance is
    taken, as coefficients on the step's variables per group g (an outcome: {its number: 1}; a
    ratio R_g = sum y / sum x linearised as u = (y - R_g x) / xbar_g: {y: 1 / xbar_g, x: -R_g / xbar_g}).
    `residual[g]`: coefficients on the feature variables subtracted first (minus the group's
    regression slopes of the quantity), so sigma2 is estimated from neighbour differences of the
    regression residual: a neighbour on the score whose features differ then adds less of the
    difference in their expected outcomes to sigma2. `pairs` (the pair_sums step) adds V_pop (see the
    module's docstring): `correction` holds the controls' regression slopes of the control-side
    quantity on the feature variables (the bias correction's; None or empty without it)."""
    rows = {int(r["treated"]): r for r in result.records()}
    t, c = rows.get(1), rows.get(0)
    if t is None or c is None:
        return MatchingVariance(math.nan, math.nan, 0.0, 0)
    n1 = _f(t["sum_w"])
    sums = {}
    for g, row in ((1, t), (0, c)):
        full = dict(coefs[g])
        for j, v in ((residual or {}).get(g) or {}).items():
            full[j] = full.get(j, 0.0) + v
        sums[g] = _quadratic(row, full)
    alone = int(_f(t["n_units"]) - _f(t["n_with_neighbour"]) + _f(c["n_units"]) - _f(c["n_with_neighbour"]))
    population = None
    if pairs is not None and "sum_s2" in c:
        prow = pairs.one()
        # a_i = (treated quantity of i) - (its matches' mean of the control quantity) - beta_C'(x_i - their mean x)
        beta = correction or {}
        alpha = dict(coefs[1])
        gamma = dict(coefs[0])
        for j, b in beta.items():
            alpha[j] = alpha.get(j, 0.0) - b
            gamma[j] = gamma.get(j, 0.0) - b
        n, total, square = matched_difference_squares(prow, alpha, gamma)
        if n > 0:
            full = dict(coefs[0])
            for j, v in ((residual or {}).get(0) or {}).items():
                full[j] = full.get(j, 0.0) + v
            # controls: w^2 sigma2 less the share2 sigma2 already in the treated units' squared differences
            reuse = sums[0] - _quadratic(c, full, "s2")
            population = (square - total * total / n + reuse) / (n1 * n1)
    return MatchingVariance(sums[1] / (n1 * n1), sums[0] / (n1 * n1), n1, alone, population)


@dataclass(frozen=True)
class MatchingInference:
    """A run's variance sums, its bias-correction sums (None when off), the number of each outcome
    quantity in them (nn_variance.variable_numbers) and the number of features."""

    variance_sums: QueryResult
    bias_sums: QueryResult | None
    numbers: dict
    n_features: int
    pair_sums: QueryResult | None = None

    def shift(self, key: str) -> float:
        """What the bias correction adds to the matched controls' mean of `key` (NaN: none)."""
        if self.bias_sums is None or key not in self.numbers:
            return math.nan
        return control_mean_shift(self.bias_sums, self.numbers[key], self.n_features)

    def variance(self, coefs: dict[int, dict[str, float]]) -> MatchingVariance:
        """The variance of the quantity sum_key c_key key per group (coefs[g]), of its regression
        residual when the bias correction's sums are there."""
        n_out = len(self.numbers)
        by_number = {g: {self.numbers[k]: c for k, c in cs.items()} for g, cs in coefs.items()}
        residual = None
        correction = None
        if self.bias_sums is not None and self.n_features:
            residual = {}
            for g, cs in coefs.items():
                gamma = [0.0] * self.n_features
                for k, c in cs.items():
                    fit = regression_slopes(self.bias_sums, g, self.numbers[k], self.n_features)
                    if fit is None:
                        gamma = None
                        break
                    gamma = [a + c * float(b) for a, b in zip(gamma, fit[0])]
                if gamma is not None:
                    residual[g] = {n_out + j + 1: -gamma[j] for j in range(self.n_features)}
            if 0 in residual:
                correction = {j: -v for j, v in residual[0].items()}  # the controls' slopes
        return matching_variance(self.variance_sums, by_number, residual, self.pair_sums, correction)
