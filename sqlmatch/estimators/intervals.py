"""Normal-approximation intervals: the one place the critical value and the log-scale ratio
interval are computed, so every estimator and sensitivity figure agrees on them."""

from __future__ import annotations

import math
from statistics import NormalDist


def critical_value(level: float = 0.95) -> float:
    """Two-sided standard normal critical value z_{1 - (1 - level) / 2} (1.96 at 95%)."""
    if not 0.0 < level < 1.0:
        raise ValueError(f"level must lie strictly between 0 and 1, got {level!r}")
    return NormalDist().inv_cdf(0.5 + level / 2.0)


def normal_interval(estimate: float, se: float | None, level: float = 0.95) -> tuple[float | None, float | None]:
    """estimate -/+ z se; (None, None) when the standard error is unknown."""
    if se is None or not math.isfinite(se):
        return None, None
    z = critical_value(level)
    return estimate - z * se, estimate + z * se


def log_ratio_interval(ratio: float, log_se: float, level: float = 0.95) -> tuple[float, float]:
    """Interval for a positive ratio built on the log scale and mapped back:
    exp(log(ratio) -/+ z se_log) (delta method on log ratio; e.g. Katz et al. 1978 for the risk ratio)."""
    z = critical_value(level)
    return math.exp(math.log(ratio) - z * log_se), math.exp(math.log(ratio) + z * log_se)
