"""The results history table in the warehouse (spec key study.results_table).

Append-only: each run inserts its rows in one statement, and a view `<table>_current` shows the
latest run per study, cohort, method and outcome. Appending (rather than deleting and
re-inserting) keeps every engine on the same SQL: Spark's default tables have no DELETE.
"""

from __future__ import annotations

import datetime as dt
import math
import uuid

from sqlglot import exp

from sqlmatch import dialects, render
from sqlmatch.engines.base import Engine
from sqlmatch.results import StudyResults
from sqlmatch.spec import Spec


def _statements(template: str, dialect: str, **context) -> list[str]:
    sql, written_in = render.render(template, dialect, **context)
    return [dialects.generate(s, dialect) for s in dialects.parse(sql, written_in)]


def _finite(x):
    return x if isinstance(x, (int, float)) and math.isfinite(x) else None


def record(spec: Spec, results: StudyResults, engine: Engine, run_at: dt.datetime | None = None) -> str:
    """Append this run's effects; returns the run id."""
    table = render.work_table_sql(spec.work_schema, spec.results_table)
    view = render.work_table_sql(spec.work_schema, spec.results_table + "_current")
    # Microseconds kept: two runs within one second must still order by time in the _current view
    # (a tie would fall to the random suffix of run_id).
    run_at = run_at or dt.datetime.now(dt.timezone.utc).replace(tzinfo=None)
    run_id = f"{run_at:%Y%m%dT%H%M%S%f}-{uuid.uuid4().hex[:8]}"
    rows = [
        {
            "study": spec.name,
            "cohort": results.cohort,
            "method": results.matching.method,
            "outcome": e.outcome,
            "run_id": run_id,
            "run_at": run_at.isoformat(sep=" "),
            "estimate": _finite(e.estimate),
            "std_error": _finite(e.std_error),
            "ci_low": _finite(e.ci_low),
            "ci_high": _finite(e.ci_high),
            "n_treated": e.n_treated,
            "n_control": e.n_control,
        }
        for e in results.effects
    ]
    for sql in _statements("results_history", engine.dialect, table=table):
        engine.execute(sql)
    for sql in _statements("results_insert", engine.dialect, table=table, rows=rows):
        engine.execute(sql)
    (query,) = dialects.parse(render.render("results_current", engine.dialect, table=table)[0], render.SOURCE_DIALECT)
    view_node = exp.to_table(view, dialect=render.SOURCE_DIALECT)
    engine.execute(exp.Drop(tables=[view_node.copy()], kind="VIEW", exists=True).sql(engine.dialect))
    engine.execute(dialects.generate(exp.Create(this=view_node, kind="VIEW", expression=query), engine.dialect))
    return run_id
