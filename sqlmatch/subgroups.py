"""Effects per subgroup ([[subgroups]]) from the per-level outcome sums, and a test of whether the
effect differs between levels. Pure: no database.

Each level's effect is the study's own estimator (att.py, ratio.py) on the strata restricted to the
level. Heterogeneity: Cochran's Q over the levels with an estimate (Cochran 1954, Biometrics 10:101),
Q = sum_l (tau_l - tau_bar)^2 / v_l with tau_bar the inverse-variance weighted mean, referred to a
chi-square on L - 1 degrees of freedom: the same computation as for pooled cohorts (pooling.py). The levels are independent samples (a unit is in one level),
so the test is valid; with few units per level it has little power, and a small p-value among many
subgroups and outcomes can be chance. A level with fewer than report.min_cell_size enrolled or
comparison units gets no estimate (and stays out of Q): it could single out a few people. Under
propensity-score weighting the levels share the fitted score, so their estimates are correlated:
the test is then the Wald statistic of equal effects with their joint sandwich covariance.
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
        if f"weighting_subgroup_{g.name}" in r:
            out += _weighted_levels(spec, g, outcomes, result, levels, r, _score_weighted(r, g, spec), "Wald chi-square of equal effects (levels share the fitted score)")
            continue
        if f"balancing_subgroup_{g.name}" in r:
            out += _weighted_levels(spec, g, outcomes, result, levels, r, _balanced(r, g), "Wald chi-square of equal effects (levels share the balancing weights)")
            continue
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


def _score_weighted(r, g, spec):
    """Propensity-score weighting: (outcome, levels) -> each level's weighted difference (each group's
    weights normalised within the level) and the sandwich covariance of all levels, which share the
    score fitted on every unit (estimators/weighting.level_effects)."""
    import dataclasses

    from sqlmatch.estimators.weighting import level_effects, sums_from_row

    study = r["weighting_sandwich"].one()
    by_level = _rows_by_level(r[f"weighting_subgroup_{g.name}"])

    def joint(o, shown):
        global_sums = sums_from_row(study, o.name)
        fits = [dataclasses.replace(sums_from_row(by_level[lv], o.name), information=global_sums.information, score_products=global_sums.score_products) for lv in shown]
        le = level_effects(fits, global_sums.information, global_sums.score_products, spec.propensity.ridge)
        return le.estimates, le.covariance

    return joint, by_level


def _balanced(r, g):
    """Entropy balancing: each level's enrolled mean minus its non-enrolled units' weighted mean, with
    the study-wide weights, and the sandwich covariance of all levels, which share the balance
    conditions and targets fitted on every unit (estimators/entropy_balancing.level_effects)."""
    from sqlmatch.estimators.entropy_balancing import level_effects
    from sqlmatch.matching.entropy_balancing import moment_count, sums_from_row

    study = r["balancing_sandwich"].one()
    p = moment_count(study)
    by_level = _rows_by_level(r[f"balancing_subgroup_{g.name}"])

    def joint(o, shown):
        moments, _ = sums_from_row(study, o.name, p)
        le = level_effects(moments, [sums_from_row(by_level[lv], o.name, p)[1] for lv in shown])
        return le.estimates, le.covariance

    return joint, by_level


def _rows_by_level(sums: QueryResult) -> dict:
    j = sums.columns.index("subgroup_level")
    return {row[j]: dict(zip(sums.columns, row)) for row in sums.rows}


def _weighted_levels(spec, g, outcomes, counts: QueryResult, levels, r, weighted, test: str) -> list[SubgroupEffects]:
    """A weighting method's levels: `weighted` = (joint, by_level), joint(outcome, levels) giving
    the levels' effects and their joint covariance; heterogeneity by the Wald test of equal effects
    with that covariance (Cochran's Q when the levels are independent). Counts are the level's
    weighted units; small levels are withheld before anything is estimated."""
    import numpy as np

    from sqlmatch.estimators.intervals import normal_interval
    from sqlmatch.estimators.weighting import equal_effects_test

    joint, by_level = weighted
    describes = f"levels of {g.feature}" if g.feature else f"{g.where_text} (yes / no)"
    out = []
    for o in outcomes:
        counted, shown = [], []
        for level in levels:
            sub = _level_result(counts, level)
            t, c = (aggregates.ratio_sums(sub, o.name) if o.kind == "ratio" else aggregates.outcome_moments(sub, o.name))
            n_t, n_c = int(t.n.sum()), int(c.n.sum())
            small = is_small(n_t, spec.min_cell_size) or is_small(n_c, spec.min_cell_size)
            counted.append((level, n_t, n_c, small))
            if not small and n_t > 0 and n_c > 0 and level in by_level:
                shown.append(level)
        est = cov = None
        if shown:
            est, cov = joint(o, shown)
        rows, ok = [], []
        for level, n_t, n_c, small in counted:
            if level not in shown:
                rows.append(SubgroupLevel(str(level), n_t, n_c, Interval(None), withheld=small))
                continue
            k = shown.index(level)
            var = cov[k, k]
            se = math.sqrt(var) if math.isfinite(var) and var >= 0 else None
            lo, hi = normal_interval(est[k], se)
            iv = Interval(_finite(est[k]), _finite(se), _finite(lo), _finite(hi))
            rows.append(SubgroupLevel(str(level), n_t, n_c, iv))
            if iv.estimate is not None and iv.std_error is not None:
                ok.append(k)
        q = df = p = None
        if len(ok) >= 2:
            q, df, p = equal_effects_test(est[ok], cov[np.ix_(ok, ok)])
        out.append(
            SubgroupEffects(
                subgroup=g.name, describes=describes, outcome=o.name, levels=tuple(rows), q=q, df=df, p_value=p, test=test
            )
        )
    return out
