"""Several enrolment months in one go (`sqlmatch run --cohorts 2026-01:2026-06`): the study runs
once per cohort and each outcome's effects are pooled (see estimators/pooling.py)."""

from __future__ import annotations

import datetime as dt
import json
import re
from dataclasses import asdict, dataclass

from sqlmatch.errors import SqlmatchError
from sqlmatch.estimators.pooling import pool
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


@dataclass(frozen=True)
class PooledEffect:
    outcome: str
    estimate: float
    std_error: float
    ci_low: float
    ci_high: float
    cohorts: int
    q: float
    q_p_value: float | None
    i_squared: float


@dataclass
class CohortResults:
    study: str
    cohorts: list[StudyResults]
    pooled: list[PooledEffect]

    @classmethod
    def combine(cls, results: list[StudyResults]) -> "CohortResults":
        pooled = []
        for outcome in [e.outcome for e in results[0].effects]:
            effects = [r.effect(outcome) for r in results]
            p = pool([e.estimate for e in effects], [e.std_error for e in effects])
            pooled.append(PooledEffect(outcome, p.estimate, p.std_error, p.ci_low, p.ci_high, p.cohorts, p.q, p.q_p_value, p.i_squared))
        return cls(study=results[0].study, cohorts=results, pooled=pooled)

    @property
    def rows_fetched(self) -> int:
        return sum(r.rows_fetched for r in self.cohorts)

    def to_dict(self) -> dict:
        return {
            "study": self.study,
            "pooled": [asdict(p) for p in self.pooled],
            "pooling": "inverse-variance weighted (fixed effect); Cochran's Q and I^2 for heterogeneity",
            "cohorts": [r.to_dict() for r in self.cohorts],
            "rows_fetched": self.rows_fetched,
        }

    def to_json(self) -> str:
        return json.dumps(self.to_dict(), indent=2) + "\n"
