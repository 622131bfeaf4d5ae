"""Matched-pair (1:1) inference from aggregates of the within-pair differences d = y_treated - y_control.

Two procedures, each fed by a handful of numbers computed in SQL:

* ``paired_difference(n_pairs, sum_d, sum_d2)``: mean difference with a Student t interval
  (the one-sample t procedure applied to the differences; Student 1908, Biometrika 6:1-25).
* ``signed_rank(t_plus, n_nonzero, tie_term)``: Wilcoxon's signed-rank test (Wilcoxon 1945,
  Biometrics Bulletin 1:80-83) with the large-sample normal approximation. The SQL side drops
  pairs with d = 0 (Wilcoxon's own convention), ranks |d| among the remaining pairs with average
  ranks for ties, and returns T+ = sum of ranks of positive differences, the number of non-zero
  pairs, and the tie term sum over tie groups of (t^3 - t).

Note on the statistic: the two-sided test here reports T+ and the z of T+; some references and
libraries report min(T+, T-) instead. Both give the same two-sided p-value because the null
distribution is symmetric about n(n+1)/4 and T+ + T- = n(n+1)/2.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from sqlmatch.estimators.intervals import critical_value as _z

__all__ = ["PairedDifference", "SignedRank", "paired_difference", "signed_rank"]


def _norm_sf(z: float) -> float:
    """Upper-tail standard normal probability, accurate in the far tail (erfc identity)."""
    return 0.5 * math.erfc(z / math.sqrt(2.0))


@dataclass(frozen=True)
class PairedDifference:
    estimate: float  # mean within-pair difference
    std_error: float
    ci_low: float
    ci_high: float
    level: float
    n_pairs: int
    df: int
    sd: float  # standard deviation of the differences (divisor n - 1)
    t_stat: float  # for H0: mean difference = 0
    p_value: float  # two-sided


@dataclass(frozen=True)
class SignedRank:
    t_plus: float  # sum of ranks of positive differences
    t_minus: float  # sum of ranks of negative differences
    n_nonzero: int
    tie_term: float  # sum over tie groups of (t^3 - t)
    expected: float  # n(n+1)/4 under H0
    variance: float  # n(n+1)(2n+1)/24 - tie_term/48 under H0
    z: float  # (T+ - expected) / sqrt(variance); positive when treated tends to exceed control
    p_value: float  # two-sided
    p_greater: float  # one-sided, alternative: differences tend to be positive
    p_less: float  # one-sided, alternative: differences tend to be negative
    sum_ranks: float  # sum of the ranks q_s = n(n+1)/2 (input to Rosenbaum bounds)
    sum_ranks_sq: float  # sum of q_s^2 = n(n+1)(2n+1)/6 - tie_term/12


def paired_difference(n_pairs: int, sum_d: float, sum_d2: float, level: float = 0.95) -> PairedDifference:
    """Mean within-pair difference with a t interval, from n, sum d and sum d^2.

    For large outcomes, computing sum d^2 in SQL about a rough centre (e.g. subtracting a known
    constant from every d and adding it back to the mean) avoids cancellation; the variance
    from sums below is exact in exact arithmetic.
    """
    _z(level)  # validates level
    n = int(n_pairs)
    if n != n_pairs or n < 2:
        raise ValueError("need an integer number of pairs, at least 2")
    mean = float(sum_d) / n
    # Sample variance from sums: (sum d^2 - n dbar^2) / (n - 1).
    var = max((float(sum_d2) - n * mean * mean) / (n - 1), 0.0)
    sd = math.sqrt(var)
    se = sd / math.sqrt(n)
    df = n - 1
    from scipy import stats  # Student t quantiles; scipy is installed as a dependency of statsmodels

    tcrit = float(stats.t.ppf(0.5 + level / 2.0, df))
    if se > 0:
        t_stat = mean / se
        p = float(2.0 * stats.t.sf(abs(t_stat), df))
    else:
        t_stat = math.copysign(math.inf, mean) if mean != 0 else float("nan")
        p = 0.0 if mean != 0 else float("nan")
    return PairedDifference(mean, se, mean - tcrit * se, mean + tcrit * se, level, n, df, sd, t_stat, p)


def signed_rank(t_plus: float, n_nonzero: int, tie_term: float = 0.0) -> SignedRank:
    """Wilcoxon signed-rank test, normal approximation without continuity correction.

    ``t_plus``: sum of the (average) ranks of |d| over pairs with d > 0, ranks taken among the
    ``n_nonzero`` pairs with d != 0. ``tie_term``: sum over groups of tied |d| of (t^3 - t),
    zero when there are no ties.
    """
    n = int(n_nonzero)
    if n != n_nonzero or n < 1:
        raise ValueError("n_nonzero must be a positive integer")
    total = n * (n + 1) / 2.0
    t_plus = float(t_plus)
    if not -1e-9 <= t_plus <= total + 1e-9:
        raise ValueError(f"t_plus must lie in [0, n(n+1)/2] = [0, {total}], got {t_plus}")
    tie_term = float(tie_term)
    if tie_term < 0 or tie_term > n**3 - n + 1e-9:
        raise ValueError("tie_term must lie in [0, n^3 - n]")
    # Null mean and tie-corrected null variance of T+ (Wilcoxon 1945; tie correction as in
    # Lehmann 1975, *Nonparametrics*, ch. 3 - recalled).
    expected = n * (n + 1) / 4.0
    variance = n * (n + 1) * (2 * n + 1) / 24.0 - tie_term / 48.0
    z = (t_plus - expected) / math.sqrt(variance)
    p_greater = _norm_sf(z)
    p_less = _norm_sf(-z)
    p_two = min(1.0, 2.0 * _norm_sf(abs(z)))
    sum_sq = n * (n + 1) * (2 * n + 1) / 6.0 - tie_term / 12.0
    return SignedRank(
        t_plus=t_plus,
        t_minus=total - t_plus,
        n_nonzero=n,
        tie_term=tie_term,
        expected=expected,
        variance=variance,
        z=z,
        p_value=p_two,
        p_greater=p_greater,
        p_less=p_less,
        sum_ranks=total,
        sum_ranks_sq=sum_sq,
    )
