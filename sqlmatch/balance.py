"""Balance diagnostics from per-group aggregates: standardized mean differences and
variance ratios, before matching (every unit once) and after (matching weights).

SMD (Austin 2009, Stat Med 28:3083, eqs. for continuous and dichotomous covariates):
    continuous: d = (m_T - m_C) / sqrt((s2_T + s2_C) / 2)
    binary:     d = (p_T - p_C) / sqrt((p_T (1 - p_T) + p_C (1 - p_C)) / 2)
After matching, means and variances are weighted; the weighted variance is the unbiased
form for reliability weights, sum(w) / (sum(w)^2 - sum(w^2)) * sum(w (x - m)^2) (the same
as numpy.cov with aweights). The SMD after matching divides by the pooled SD before matching
(Stuart 2010, Statistical Science 25:1, section 5; Austin 2009; recalled), so a matching that
shrinks the variances cannot make the after value look smaller than the gap in means is.
"""

from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True)
class GroupMoments:
    """Sums for one feature in one group: weights (or counts), weighted sums and squares."""

    sum_w: float
    sum_w2: float
    sum_x: float
    sum_x2: float

    @property
    def mean(self) -> float:
        return self.sum_x / self.sum_w if self.sum_w > 0 else math.nan

    @property
    def variance(self) -> float:
        denom = self.sum_w**2 - self.sum_w2
        if self.sum_w <= 0 or denom <= 0:
            return math.nan
        ss = max(self.sum_x2 - self.sum_x**2 / self.sum_w, 0.0)
        return self.sum_w / denom * ss


@dataclass(frozen=True)
class BalanceStat:
    mean_treated: float
    mean_control: float
    smd: float
    variance_ratio: float
    pooled_sd: float = math.nan  # sqrt((s2_T + s2_C) / 2), the SMD's denominator unless a scale is given


def _clean(x: float) -> float:
    return x if math.isfinite(x) else math.nan


def compare(treated: GroupMoments, control: GroupMoments, binary: bool, scale: float | None = None) -> BalanceStat:
    """`scale`: the SMD's denominator (after matching: the pooled SD before matching); None: this
    comparison's own pooled SD."""
    m1, m0 = treated.mean, control.mean
    if binary:
        v1, v0 = m1 * (1 - m1), m0 * (1 - m0)
    else:
        v1, v0 = treated.variance, control.variance
    own = math.sqrt((v1 + v0) / 2) if math.isfinite(v1 + v0) else math.nan
    pooled = own if scale is None else scale
    if pooled > 0:
        smd = (m1 - m0) / pooled
    elif pooled == 0 and m1 == m0:
        smd = 0.0
    else:
        smd = math.nan
    ratio = v1 / v0 if v0 > 0 else math.nan
    return BalanceStat(_clean(m1), _clean(m0), _clean(smd), _clean(ratio), _clean(own))
