"""Effects per subgroup ([[subgroups]]) from the per-level outcome sums, and a test of whether the
effect differs between levels. Pure: no database.

Each level's effect is the study's own estimator (att.py, ratio.py) on the strata restricted to the
level. Heterogeneity: Cochran's Q over the levels with an estimate (Cochran 1954, Biometrics 10:101),
Q = sum_l (tau_l - tau_bar)^2 / v_l with tau_bar the inverse-variance weighted mean, referred to a
chi-square on L - 1 degrees of freedom: the same computation as for pooled cohorts (pooling.py). The levels are independent samples (a unit is in one level),
so the test is valid; with few units per level it has little power, and a small p-value among many
subgroups and outcomes can be chance. A level with fewer than report.min_cell_size enrolled or
comparison units gets no estimate (and stays out of Q): it could single out a few people.
"""

from __future__ import annotations

import math

from sqlmatch import aggregates
from sqlmatch.engines.base import QueryResult
from sqlmatch.estimators.pooling import pool
from sqlmatch.estimators.att import stratified_att, stratum_weights
from sqlmatch.estimators.ratio import RatioSums, ratio_effect

RATIO_FIELDS = ("n", "sum_y", "sum_x", "sum_yy", "sum_xx", "sum_xy")
from sqlmatch.privacy import is_small
from sqlmatch.results import Interval, SubgroupEffects, SubgroupLevel


def _level_result(result: QueryResult, level) -> QueryResult:
    i = result.columns.index("subgroup_level")
    return QueryResult(result.columns, tuple(row for row in result.rows if row[i] == level))


def _finite(x):
    return None if x is None or not math.isfinite(x) else float(x)


def subgroup_effects(spec, outcomes, r) -> list[SubgroupEffects]:
    out = []
    estimand = spec.matching.estimand
    for g in spec.subgroups:
        result = r[f"subgroup_{g.name}"]
        i = result.columns.index("subgroup_level")
        levels = sorted({row[i] for row in result.rows}, key=str)
        for o in outcomes:
            rows, shown = [], []
            for level in levels:
                sub = _level_result(result, level)
                if o.kind == "ratio":
                    t, c = aggregates.ratio_sums(sub, o.name)
                    keep = (t.n > 0) & (c.n > 0)  # strata of this level holding both groups
                    t, c = (RatioSums(*(getattr(x, f)[keep] for f in RATIO_FIELDS)) for x in (t, c))
                    n_t, n_c = int(t.n.sum()), int(c.n.sum())
                    ok = bool(keep.any())
                    try:
                        m = ratio_effect(t, c, weights=stratum_weights(t.n, c.n, estimand), singleton="pool") if ok else None
                    except ValueError:  # e.g. every cell of a group holds one unit: no variance
                        m = None
                else:
                    t, c = aggregates.outcome_moments(sub, o.name)
                    keep = (t.n > 0) & (c.n > 0)
                    n_t, n_c = int(t.n[keep].sum()), int(c.n[keep].sum())
                    ok = bool(keep.any())
                    m = stratified_att(t, c, estimand=estimand) if ok else None
                small = is_small(n_t, spec.min_cell_size) or is_small(n_c, spec.min_cell_size)
                if m is None or small:
                    rows.append(SubgroupLevel(str(level), n_t, n_c, Interval(None), withheld=small))
                    continue
                iv = Interval(_finite(m.estimate), _finite(m.std_error), _finite(m.ci_low), _finite(m.ci_high))
                rows.append(SubgroupLevel(str(level), n_t, n_c, iv))
                if iv.estimate is not None and iv.std_error is not None:
                    shown.append(iv)
            q = df = p = None
            if len(shown) >= 2:  # Cochran's Q as for pooled cohorts (estimators/pooling.py)
                pooled = pool([x.estimate for x in shown], [x.std_error for x in shown])
                q, df, p = pooled.q, pooled.cohorts - 1, pooled.q_p_value
            describes = f"levels of {g.feature}" if g.feature else f"{g.where_text} (yes / no)"
            out.append(SubgroupEffects(subgroup=g.name, describes=describes, outcome=o.name, levels=tuple(rows), q=q, df=df, p_value=p))
    return out
