"""Sensitivity of a finding to unmeasured confounding, from summary numbers only.

* Rosenbaum bounds for Wilcoxon's signed-rank statistic in matched pairs
  (Rosenbaum 2002, *Observational Studies*, 2nd ed., ch. 4, §4.3.3 - section recalled).
* Robustness value of a regression coefficient (Cinelli & Hazlett 2020, JRSS-B 82(1):39-67).
* E-value for a risk ratio, or for a standardised mean difference through RR ~= exp(0.91 d)
  (VanderWeele & Ding 2017, Annals of Internal Medicine 167(4):268-274).
* ``plain_words``: one sentence per result, for reports.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from sqlmatch.estimators.intervals import critical_value

__all__ = [
    "RosenbaumBound",
    "RosenbaumScan",
    "RobustnessValue",
    "EValue",
    "rosenbaum_bound",
    "rosenbaum_scan",
    "rosenbaum_from_signed_rank",
    "robustness_value",
    "e_value",
    "e_value_continuous",
    "plain_words",
]

_ALTERNATIVES = ("greater", "less")


def _norm_sf(z: float) -> float:
    """Upper-tail standard normal probability (erfc identity, accurate in the far tail)."""
    return 0.5 * math.erfc(z / math.sqrt(2.0))


def _check_alpha(alpha: float) -> None:
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must lie strictly between 0 and 1, got {alpha!r}")


# ---------------------------------------------------------------------------------------------
# Rosenbaum bounds, signed-rank statistic
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RosenbaumBound:
    gamma: float
    p_plus: float  # Gamma / (1 + Gamma)
    expected_upper: float  # p_plus * sum q
    expected_lower: float  # (1 - p_plus) * sum q
    variance: float  # p_plus (1 - p_plus) * sum q^2 (same for both bounds)
    z_upper: float
    p_upper: float  # largest one-sided p-value compatible with bias Gamma (normal approximation)
    p_lower: float  # smallest one-sided p-value compatible with bias Gamma


@dataclass(frozen=True)
class RosenbaumScan:
    alpha: float
    alternative: str
    statistic: float  # T+ for 'greater', T- = sum q - T+ for 'less'
    rows: tuple[RosenbaumBound, ...]
    first_gamma_above_alpha: float | None  # first grid Gamma with p_upper > alpha; None if none up to the cap
    gamma_at_alpha: float | None  # Gamma (continuous) where p_upper = alpha; 1.0 if p_upper > alpha already at 1
    gamma_max: float

    def to_frame(self):
        """The table as a pandas DataFrame, one row per Gamma."""
        import pandas as pd

        return pd.DataFrame([r.__dict__ for r in self.rows])


def _statistic(t_plus: float, sum_q: float, sum_q2: float, alternative: str) -> float:
    if alternative not in _ALTERNATIVES:
        raise ValueError(f"alternative must be one of {_ALTERNATIVES}, got {alternative!r}")
    t_plus, sum_q, sum_q2 = float(t_plus), float(sum_q), float(sum_q2)
    if sum_q <= 0 or sum_q2 <= 0:
        raise ValueError("sum_q and sum_q2 must be positive (at least one non-zero pair)")
    if not -1e-9 <= t_plus <= sum_q + 1e-9:
        raise ValueError("t_plus must lie between 0 and sum_q")
    return t_plus if alternative == "greater" else sum_q - t_plus


def _bound(stat: float, sum_q: float, sum_q2: float, gamma: float) -> RosenbaumBound:
    if not gamma >= 1.0:
        raise ValueError(f"gamma must be at least 1, got {gamma!r}")
    # Rosenbaum (2002, §4.3.3): under bias at most Gamma, T+ is bounded by the sum of independent
    # q_s * Bernoulli(p), p = Gamma/(1+Gamma) (upper) or 1/(1+Gamma) (lower);
    # mean p * sum q_s, variance p (1 - p) * sum q_s^2; normal approximation for the tail.
    p = gamma / (1.0 + gamma)
    var = p * (1.0 - p) * sum_q2
    e_up = p * sum_q
    e_lo = (1.0 - p) * sum_q
    z_up = (stat - e_up) / math.sqrt(var)
    z_lo = (stat - e_lo) / math.sqrt(var)
    return RosenbaumBound(gamma, p, e_up, e_lo, var, z_up, _norm_sf(z_up), _norm_sf(z_lo))


def rosenbaum_bound(t_plus: float, sum_q: float, sum_q2: float, gamma: float, alternative: str = "greater") -> RosenbaumBound:
    """Bounds on the one-sided signed-rank p-value for one value of Gamma >= 1.

    ``t_plus``: sum of ranks of |d| over pairs with d > 0; ``sum_q``, ``sum_q2``: sum of the ranks
    and of the squared ranks over all non-zero pairs (average ranks for ties). ``alternative``:
    'greater' tests for positive differences, 'less' for negative ones (uses T- = sum_q - t_plus).
    """
    stat = _statistic(t_plus, sum_q, sum_q2, alternative)
    return _bound(stat, float(sum_q), float(sum_q2), float(gamma))


def rosenbaum_scan(
    t_plus: float,
    sum_q: float,
    sum_q2: float,
    alpha: float = 0.05,
    gamma_max: float = 20.0,
    step: float = 0.1,
    alternative: str = "greater",
) -> RosenbaumScan:
    """Table of bounds for Gamma = 1, 1 + step, ..., gamma_max and the Gamma where the finding stops holding.

    ``first_gamma_above_alpha`` is the first grid value whose upper-bound p-value exceeds
    ``alpha`` (None if none up to ``gamma_max``); ``gamma_at_alpha`` solves p_upper(Gamma) = alpha
    by bisection (the upper-bound p-value increases with Gamma while T <= sum q).
    """
    _check_alpha(alpha)
    if not (gamma_max >= 1.0 and step > 0):
        raise ValueError("need gamma_max >= 1 and step > 0")
    stat = _statistic(t_plus, sum_q, sum_q2, alternative)
    sum_q, sum_q2 = float(sum_q), float(sum_q2)
    n_steps = int(math.floor((gamma_max - 1.0) / step + 1e-9))
    gammas = [round(1.0 + k * step, 10) for k in range(n_steps + 1)]
    rows = tuple(_bound(stat, sum_q, sum_q2, g) for g in gammas)
    first = next((r.gamma for r in rows if r.p_upper > alpha), None)

    def excess(g: float) -> float:
        return _bound(stat, sum_q, sum_q2, g).p_upper - alpha

    if excess(1.0) > 0:
        at_alpha: float | None = 1.0
    elif excess(gamma_max) < 0:
        at_alpha = None
    else:
        lo, hi = 0.0, math.log(gamma_max)
        for _ in range(200):
            mid = 0.5 * (lo + hi)
            if excess(math.exp(mid)) > 0:
                hi = mid
            else:
                lo = mid
            if hi - lo < 1e-13:
                break
        at_alpha = math.exp(0.5 * (lo + hi))
    return RosenbaumScan(alpha, alternative, stat, rows, first, at_alpha, float(gamma_max))


def rosenbaum_from_signed_rank(
    t_plus: float,
    n_nonzero: int,
    tie_term: float = 0.0,
    alpha: float = 0.05,
    gamma_max: float = 20.0,
    step: float = 0.1,
    alternative: str = "greater",
) -> RosenbaumScan:
    """Rosenbaum bounds from the signed-rank aggregates of 1:1 matched pairs, as a query over the
    pairs returns them: T+ (sum of the average ranks of |d| over pairs with d > 0), the number of
    pairs with d != 0 and the tie term sum (t^3 - t) over groups of tied |d|. The ranks 1..n with
    ties averaged have sum q = n(n+1)/2 and sum q^2 = n(n+1)(2n+1)/6 - tie_term/12
    (see estimate.pairs.signed_rank), which is all the bounds need besides T+."""
    from sqlmatch.estimators.pairs import signed_rank

    sr = signed_rank(t_plus, n_nonzero, tie_term)
    return rosenbaum_scan(sr.t_plus, sr.sum_ranks, sr.sum_ranks_sq, alpha=alpha, gamma_max=gamma_max, step=step, alternative=alternative)


# ---------------------------------------------------------------------------------------------
# Robustness value
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RobustnessValue:
    t_stat: float
    df: float
    q: float  # share of the estimate a confounder would remove (1 = all of it)
    alpha: float
    partial_r2: float  # partial R^2 of treatment with the outcome, t^2 / (t^2 + df)
    f_crit: float  # |t*_{alpha, df-1}| / sqrt(df - 1)
    rv_q: float  # robustness value for reducing the estimate by 100q %
    rv_q_alpha: float  # robustness value for making the reduced estimate statistically insignificant


def _rv_formula(f: float) -> float:
    # RV = 1/2 (sqrt(f^4 + 4 f^2) - f^2) (Cinelli & Hazlett 2020, §4 - equation number not checked).
    f2 = f * f
    return 0.5 * (math.sqrt(f2 * f2 + 4.0 * f2) - f2)


def robustness_value(t_stat: float, df: float, q: float = 1.0, alpha: float = 0.05) -> RobustnessValue:
    """Robustness value of a regression coefficient from its t-statistic and residual df.

    ``rv_q``: the partial R^2 a confounder would need with both treatment and outcome (equal
    strength) to reduce the estimate by 100q %. ``rv_q_alpha``: the same for moving the
    confidence bound (level 1 - alpha) to the reduced value, i.e. making it insignificant.
    """
    _check_alpha(alpha)
    t_stat, df, q = float(t_stat), float(df), float(q)
    if not df > 1:
        raise ValueError("df must exceed 1")
    if not q > 0:
        raise ValueError("q must be positive")
    from scipy import stats  # Student t quantile; scipy is installed as a dependency of statsmodels

    # Partial R^2 of treatment with the outcome: t^2 / (t^2 + df) (Cinelli & Hazlett 2020, §3).
    partial_r2 = t_stat * t_stat / (t_stat * t_stat + df)
    # Partial Cohen's f of treatment, scaled by q: f_q = q |t| / sqrt(df) (Cinelli & Hazlett 2020, §4).
    f_q = q * abs(t_stat) / math.sqrt(df)
    rv_q = _rv_formula(f_q)
    # f*_{alpha, df-1} = |t*_{alpha, df-1}| / sqrt(df - 1) (Cinelli & Hazlett 2020, §4).
    f_crit = float(stats.t.ppf(1.0 - alpha / 2.0, df - 1.0)) / math.sqrt(df - 1.0)
    f_qa = f_q - f_crit
    if f_qa <= 0:
        rv_qa = 0.0  # already insignificant at the reduced value
    elif f_q < 1.0 / f_crit:
        # Equal-strength confounder binds: RV with f_{q,alpha} = f_q - f* (Cinelli & Hazlett 2020, §4).
        rv_qa = _rv_formula(f_qa)
    else:
        # Edge case where the outcome-side partial R^2 need not reach the treatment side:
        # RV = (f_q^2 - f*^2) / (1 + f_q^2) (Cinelli & Hazlett 2020, §4 - recalled, and re-derived
        # from the bias and standard-error formulas of their §4).
        rv_qa = (f_q * f_q - f_crit * f_crit) / (1.0 + f_q * f_q)
    return RobustnessValue(t_stat, df, q, alpha, partial_r2, f_crit, rv_q, rv_qa)


# ---------------------------------------------------------------------------------------------
# E-value
# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class EValue:
    rr: float  # risk ratio (or approximate risk ratio) the E-value is computed for
    rr_ci_low: float | None
    rr_ci_high: float | None
    point: float  # E-value for the estimate
    ci: float | None  # E-value for the interval limit nearer 1 (1 if the interval includes 1)


def _e(rr: float) -> float:
    # E-value = RR + sqrt(RR (RR - 1)) for RR >= 1; invert RR < 1 first (VanderWeele & Ding 2017).
    if rr < 1.0:
        rr = 1.0 / rr
    return rr + math.sqrt(rr * (rr - 1.0))


def e_value(rr: float, ci_low: float | None = None, ci_high: float | None = None) -> EValue:
    """E-value for a risk ratio and, when both limits are given, for its confidence interval."""
    rr = float(rr)
    if not (rr > 0 and math.isfinite(rr)):
        raise ValueError("the risk ratio must be positive and finite")
    point = _e(rr)
    ci = None
    if (ci_low is None) != (ci_high is None):
        raise ValueError("give both interval limits or neither")
    if ci_low is not None:
        lo, hi = float(ci_low), float(ci_high)
        if not (0 < lo <= rr <= hi):
            raise ValueError("need 0 < ci_low <= rr <= ci_high")
        # Limit nearer the null; 1 if the interval includes the null (VanderWeele & Ding 2017).
        if lo <= 1.0 <= hi:
            ci = 1.0
        elif lo > 1.0:
            ci = _e(lo)
        else:
            ci = _e(hi)
        return EValue(rr, lo, hi, point, ci)
    return EValue(rr, None, None, point, None)


def e_value_continuous(estimate: float, std_error: float, sd: float, level: float = 0.95) -> EValue:
    """E-value for a difference in means, through the standardised difference d = estimate / sd.

    Uses RR ~= exp(0.91 d) with interval exp(0.91 d +/- z * 0.91 * se_d), se_d = std_error / sd
    (VanderWeele & Ding 2017). ``sd`` is the outcome's standard deviation (e.g. in the control group).
    """
    z = critical_value(level)
    if not (sd > 0 and std_error >= 0):
        raise ValueError("need sd > 0 and std_error >= 0")
    d = float(estimate) / float(sd)
    se_d = float(std_error) / float(sd)
    # Approximate conversion of a standardised mean difference to a risk ratio (VanderWeele & Ding 2017).
    rr = math.exp(0.91 * d)
    lo = math.exp(0.91 * d - z * 0.91 * se_d)
    hi = math.exp(0.91 * d + z * 0.91 * se_d)
    return e_value(rr, lo, hi)


# ---------------------------------------------------------------------------------------------
# Plain words
# ---------------------------------------------------------------------------------------------


def _pct(x: float) -> str:
    return f"{100.0 * x:.1f}%"


def _level_pct(x: float) -> str:
    """A confidence or significance level as a short percentage: 0.95 -> '95%', 0.025 -> '2.5%'."""
    return f"{100.0 * x:.4g}%"


def plain_words(result, treatment: str = "the treatment", outcome: str = "the outcome") -> str:
    """One plain sentence describing a sensitivity result (EValue, RobustnessValue or RosenbaumScan)."""
    if isinstance(result, EValue):
        if result.point <= 1.0 + 1e-12:
            return "The estimate shows no effect, so there is nothing for an unmeasured confounder to explain away."
        text = (
            f"An unmeasured confounder would have to be associated with both {treatment} and {outcome} "
            f"by a risk ratio of {result.point:.1f} each, over and above the measured features, "
            f"to explain the estimated effect away"
        )
        if result.ci is None:
            return text + "."
        if result.ci <= 1.0 + 1e-12:
            return text + "; the confidence interval already includes no effect, so even weak confounding is enough for that."
        return text + f" ({result.ci:.1f} each to pull the confidence interval back to include no effect)."
    if isinstance(result, RobustnessValue):
        goal = "to bring the estimate to zero" if result.q == 1.0 else f"to shrink the estimate by {_pct(result.q)}"
        conf = _level_pct(1.0 - result.alpha)
        if result.rv_q_alpha == 0.0:
            tail = f"; the {conf} confidence interval already reaches that value without any confounding."
        else:
            tail = f" ({_pct(result.rv_q_alpha)} each to bring the {conf} confidence interval to that value)."
        return (
            f"An unmeasured confounder would have to explain {_pct(result.rv_q)} of the remaining variation "
            f"in both {treatment} and {outcome}, beyond the measured features, {goal}" + tail
        )
    if isinstance(result, RosenbaumScan):
        level = _level_pct(result.alpha)
        direction = "higher" if result.alternative == "greater" else "lower"
        if result.gamma_at_alpha is None:
            return (
                f"Even if an unmeasured feature made the odds of receiving {treatment} differ by a factor of "
                f"{result.gamma_max:g} between the two units of a matched pair, the signed-rank test would still "
                f"find {outcome} {direction} under {treatment} at the {level} level."
            )
        if result.gamma_at_alpha <= 1.0:
            return (
                f"Without any hidden bias the signed-rank test does not find {outcome} {direction} under "
                f"{treatment} at the {level} level, so there is no finding whose sensitivity could be measured."
            )
        return (
            f"The signed-rank test finds {outcome} {direction} under {treatment} at the {level} level, and this holds "
            f"unless an unmeasured feature could make the odds of receiving {treatment} differ by a factor of "
            f"about {result.gamma_at_alpha:.1f} between the two units of a matched pair."
        )
    raise TypeError(f"no plain-words description for {type(result).__name__}")
