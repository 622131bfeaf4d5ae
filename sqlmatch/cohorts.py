"""Several enrolment months in one go (`sqlmatch run --cohorts 2026-01:2026-06`): the study runs
once per cohort and each outcome's effects are pooled (see estimators/pooling.py).

The months are not independent samples: a never-enrolled control serves in every month, and a
unit may be a control in one month and enrol in a later one. After each month's run the
warehouse keeps every matched unit's influence term on that month's effect
(`<study>_influence_<month>`, template cohort_influence); one query then sums the products of
each unit's terms over every pair of months (cohort_covariance), the covariances the pooled
interval needs. Both are fetched as one row, whatever the number of units."""

from __future__ import annotations

import datetime as dt
import json
import math
import re
from dataclasses import asdict, dataclass

import numpy as np

from sqlmatch.errors import SqlmatchError
from sqlmatch.estimators.pooling import pool_covarying
from sqlmatch.results import StudyResults
from sqlmatch.spec import add_months

_RANGE = re.compile(r"^(\d{4})-(\d{2}):(\d{4})-(\d{2})$")


def month_range(text: str) -> list[str]:
    m = _RANGE.match(text or "")
    if not m or not (1 <= int(m.group(2)) <= 12 and 1 <= int(m.group(4)) <= 12):
        raise SqlmatchError(f"--cohorts: {text!r} is not a range of months. Fix: write FIRST:LAST, e.g. 2026-01:2026-06.")
    first = dt.date(int(m.group(1)), int(m.group(2)), 1)
    last = dt.date(int(m.group(3)), int(m.group(4)), 1)
    if last < first:
        raise SqlmatchError(f"--cohorts: {text!r} ends before it starts. Fix: put the earlier month first.")
    months, day = [], first
    while day <= last:
        months.append(f"{day:%Y-%m}")
        day = add_months(day, 1)
    if len(months) > 36:
        raise SqlmatchError(f"--cohorts: {len(months)} months; at most 36 in one run. Fix: split the range.")
    return months


# Methods whose effect is the stratified difference (or ratio) whose per-unit influence terms
# cohort_influence writes; for the others a pooled interval would have to assume the months
# independent, which they are not, so none is given.
POOLED_INTERVAL_METHODS = ("coarsened_exact", "score_bins")


def pooled_interval_refusal(spec) -> str | None:
    """Why no pooled interval can be given for this spec (None: it can)."""
    method = spec.matching.method
    if method not in POOLED_INTERVAL_METHODS:
        why = {
            "nearest_neighbour": "its variance (Abadie-Imbens, or the paired one) is not a sum of per-unit terms that sqlmatch writes per month",
            "score_weighting": "its sandwich variance counts each month's estimated score, whose per-unit terms sqlmatch does not write per month",
        }.get(method, "its variance has no per-unit terms that sqlmatch writes per month")
        return (
            f"no pooled interval for matching.method = {method!r}: the months share units (never-enrolled controls serve in "
            f"every month), so their effects covary, and {why}. The pooled estimate is shown without one; read each month's "
            f"interval, or pool with method {' or '.join(POOLED_INTERVAL_METHODS)}."
        )
    return None


def pooling_weight(effect, estimand: str) -> float:
    """A month's fixed weight: its count of the estimand's units (treated for the ATT)."""
    return float({"att": effect.n_treated, "atc": effect.n_control, "ate": effect.n_treated + effect.n_control}[estimand])


@dataclass(frozen=True)
class PooledEffect:
    outcome: str
    estimate: float
    std_error: float | None
    ci_low: float | None
    ci_high: float | None
    cohorts: int
    q: float | None
    q_p_value: float | None
    i_squared: float | None
    weights: tuple[float, ...] = ()
    std_error_if_independent: float | None = None  # same weights, covariances between months left out
    note: str | None = None  # why there is no interval, or what was pooled


@dataclass
class CohortResults:
    study: str
    cohorts: list[StudyResults]
    pooled: list[PooledEffect]
    covariances: dict | None = None  # outcome -> months x months: sums of products of influence terms
    covariance_rows: int = 1  # rows the covariance query fetched: one per part (cohorts.covariance_steps)

    @classmethod
    def combine(
        cls, results: list[StudyResults], covariances: dict | None = None, refusal: str | None = None, estimand: str = "att", covariance_rows: int = 1
    ) -> "CohortResults":
        pooled = []
        for outcome in [e.outcome for e in results[0].effects]:
            effects = [r.effect(outcome) for r in results]
            weights = [pooling_weight(e, estimand) for e in effects]
            # the per-unit terms cohort_influence writes are the stratified (unadjusted) estimator's: pool that one
            # where a month's headline is regression-adjusted, and say so
            adjusted = any(e.unadjusted is not None for e in effects)
            effects = [e.unadjusted if e.unadjusted is not None else e for e in effects] if adjusted else effects
            pooled_words = (
                "pooled from each month's unadjusted stratified effect (the months' headlines are regression-adjusted; the "
                "per-unit terms sqlmatch writes per month, from which the months' covariances come, are the plain estimator's)."
                if adjusted
                else None
            )
            note = refusal
            ses = [e.std_error for e in effects]
            if note is None and any(se is None or not math.isfinite(se) or se <= 0 for se in ses):
                note = "no pooled interval: a month's effect has no standard error."
            if note is None and (covariances is None or outcome not in covariances):
                note = "no pooled interval: the covariances between months were not computed."
            if note is not None:
                total = sum(weights)
                est = sum(w * e.estimate for w, e in zip(weights, effects)) / total
                pooled.append(PooledEffect(outcome, est, None, None, None, len(effects), None, None, None, tuple(w / total for w in weights), None, note))
                continue
            p = pool_covarying([e.estimate for e in effects], ses, covariances[outcome], weights)
            pooled.append(PooledEffect(outcome, p.estimate, p.std_error, p.ci_low, p.ci_high, p.cohorts, p.q, p.q_p_value, p.i_squared, p.weights, p.std_error_if_independent, pooled_words))
        return cls(study=results[0].study, cohorts=results, pooled=pooled, covariances=covariances, covariance_rows=covariance_rows)

    @property
    def rows_fetched(self) -> int:
        return sum(r.rows_fetched for r in self.cohorts) + (self.covariance_rows if self.covariances is not None else 0)

    def to_dict(self) -> dict:
        return {
            "study": self.study,
            "pooled": [asdict(p) for p in self.pooled],
            "pooling": POOLING_TEXT,
            "cohort_covariances": {o: [list(map(float, row)) for row in m] for o, m in (self.covariances or {}).items()},
            "cohorts": [r.to_dict() for r in self.cohorts],
            "rows_fetched": self.rows_fetched,
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2) + "\n"


POOLING_TEXT = (
    "fixed weights (each month's count of the estimand's units); variance w' S w with each month's own variance on the "
    "diagonal and, off it, the covariances of two months' effects summed over units from their influence terms in SQL "
    "(cluster-robust by unit); generalised Q and I^2 for heterogeneity"
)


def influence_step(spec, dialect: str, month: str):
    """The table step writing this month's influence terms, read from <study>_weighted_units."""
    from sqlmatch.plan import PlanContext, check_work_tables, measure_columns

    ctx = PlanContext(spec=spec, dialect=dialect)
    _, outcomes = measure_columns(spec)
    step = ctx.table_step(
        f"influence_{month}",
        "cohort_influence",
        writes=f"influence_{month.replace('-', '_')}",
        reads=[ctx.display("weighted_units")],
        purpose=f"Influence terms of every matched unit on the effects of cohort {month}.",
        outcomes=outcomes,
        ratios=[o for o in outcomes if o.kind == "ratio"],
        estimand=spec.matching.estimand,
        weighted_table=ctx.table("weighted_units"),
    )
    check_work_tables(spec, step.writes)
    return step


def leftover_influence_tables(spec, present: list[str]) -> list[str]:
    """Influence tables of this study a killed `--cohorts` run left in the work schema (only the
    names influence_step writes: <study>_influence_YYYY_MM, or its __building table)."""
    from sqlmatch.dialects import BUILDING_SUFFIX

    pattern = re.compile(re.escape(f"{spec.name}_influence_") + r"\d{4}_\d{2}(" + re.escape(BUILDING_SUFFIX) + ")?", re.IGNORECASE)
    return sorted(n for n in present if pattern.fullmatch(n))


def covariance_steps(spec, dialect: str, tables: list[str]) -> list:
    """The one-row query of the months' covariances, per outcome, from their influence tables: one
    query, or parts of at most columns.MAX_SUMS_PER_QUERY products (part 1 also counts the units),
    whose rows columns.merge_parts joins."""
    from sqlglot import exp

    from sqlmatch import render
    from sqlmatch.columns import split_sums, upper_pairs
    from sqlmatch.plan import PlanContext, measure_columns

    ctx = PlanContext(spec=spec, dialect=dialect)
    _, outcomes = measure_columns(spec)
    quoted = [exp.table_(t.split(".", 1)[1], db=t.split(".", 1)[0], quoted=True).sql(render.SOURCE_DIALECT) for t in tables]
    products = [(o.name, a, b) for o in outcomes for a, b in upper_pairs(len(tables))]
    parts = split_sums(products, first_fixed=1)
    return ctx.query_parts(
        "cohort_covariance", "cohort_covariance", reads=list(tables), purpose="Covariances of the cohorts' effects.",
        parts=[dict(sums=part, head=k == 1, part=k) for k, part in enumerate(parts, 1)], n_parts=len(parts),
        outcomes=outcomes, tables=quoted,
    )


def covariance_row(fetch, steps) -> dict:
    """The covariance query's one row from its parts (`fetch(sql)` returns a QueryResult)."""
    from sqlmatch.engines.base import merged

    return merged([fetch(s.statements[0]) for s in steps], "cohort_covariance").one()


def covariance_matrices(row: dict, outcomes, k: int) -> dict:
    from sqlmatch.columns import stat, upper_pairs

    out = {}
    for o in outcomes:
        m = np.zeros((k, k))
        for a, b in upper_pairs(k):
            m[a, b] = m[b, a] = float(row[stat(o.name, f"cov_{a}_{b}")] or 0.0)
        out[o.name] = m
    return out
