"""A Newton step's statement is rendered and parsed once per shape, then filled with each step's
coefficients (plan.PlanContext.query_step with `numbers`): the SQL must be exactly what rendering
the template with those numbers gives, on every dialect, whatever the numbers' signs and sizes."""

from __future__ import annotations

import tomllib

import numpy as np
import pytest

from sqlmatch import plan as plan_module
from sqlmatch import propensity, render
from sqlmatch.dialects import DIALECTS
from sqlmatch.matching.entropy_balancing import Moment, newton_statements
from sqlmatch.plan import PlanContext
from sqlmatch.spec import parse_spec

from conftest import DEMO_SPEC

# signs, an integer-valued double (printed 3.0), tiny and large magnitudes, zero
NUMBERS = [0.5, -0.125, 3.0, -2.0, 1e-17, -7.25e-9, 123456789.125, 0.0, -0.0, 2.5e15, 1 / 3]


def demo():
    return parse_spec(tomllib.loads(DEMO_SPEC.read_text()), source_path=DEMO_SPEC)


def design(spec):
    cols = propensity.design_columns(spec, {"age_band": ["18-24", "25-34", "35-49", "50+"]})
    cols += propensity.first_order_candidates(cols)
    return cols + propensity.second_order_candidates(cols)[:3]


def rendered(ctx, name, template, numbers, **context):
    """The statement rendered with the numbers themselves (no slots), as before the fast path."""
    sql, written_in = render.render(template, ctx.dialect, **context, **numbers)
    from sqlmatch import dialects

    return [dialects.generate(s, ctx.dialect) for s in dialects.parse(sql, written_in)]


@pytest.mark.parametrize("dialect", DIALECTS)
def test_propensity_newton_step_equals_the_rendered_one(dialect):
    spec = demo()
    cols = design(spec)
    rng = np.random.default_rng(7)
    for trial in range(3):
        beta = list(rng.choice(NUMBERS, size=len(cols))) if trial else NUMBERS[: len(cols)] + [0.25] * max(0, len(cols) - len(NUMBERS))
        ctx = PlanContext(spec=spec, dialect=dialect)
        (step,) = propensity.newton_steps(ctx, cols, beta)
        expected = rendered(
            ctx, "propensity_newton", "propensity_newton", {"beta": [float(b) for b in beta]},
            columns=cols, clamp=propensity.ETA_CLAMP, sample_per_10000=10000, cells_table=ctx.table("score_cells"),
            pairs=[(i, j) for i in range(len(cols)) for j in range(i, len(cols))], head=True, part=1, n_parts=1,
        )
        assert list(step.statements) == expected


@pytest.mark.parametrize("dialect", ["duckdb", "postgres", "spark"])
def test_entropy_newton_step_equals_the_rendered_one(dialect):
    spec = demo()
    moments = [Moment("pre_trips", "numeric", centre=7.25, scale=6.5), Moment("age_band", "level", level="25-34", centre=0.375, scale=0.5),
               Moment("pre_trips", "square", mean=7.25, centre=52.0, scale=60.0)]
    for lam in ([0.5, -0.125, 3.0], [-1e-17, 2.5e15, 0.0]):
        (got,) = newton_statements(spec, dialect, moments, lam, transient=False)
        ctx = PlanContext(spec=spec, dialect=dialect)
        expected = rendered(ctx, "balancing_newton", "entropy_balancing_newton", {"lam": lam}, moments=moments, measures_table=ctx.table("measures"),
                            pairs=[(i, j) for i in range(3) for j in range(i, 3)], head=True, part=1, n_parts=1)
        assert [got] == expected


def test_the_template_is_rendered_once_per_shape(monkeypatch):
    """Ten Newton steps of one model (for PostgreSQL: parsed and printed) render its template once;
    a model with another column set renders it again."""
    spec = demo()
    cols = design(spec)
    calls = []
    real = render.render
    monkeypatch.setattr(render, "render", lambda *a, **k: calls.append(a[0]) or real(*a, **k))
    plan_module._PARSED_WITH_SLOTS.clear()
    for step in range(10):
        propensity.newton_statements(spec, "postgres", cols, [0.1 * step] * len(cols))
    assert calls == ["propensity_newton"]
    propensity.newton_statements(spec, "postgres", cols[:-1], [0.5] * (len(cols) - 1))
    assert calls == ["propensity_newton"] * 2


def test_the_runners_duckdb_statements_give_the_formatted_ones_aggregates(demo_dir, tmp_path):
    """On DuckDB the runner sends a fit's Newton steps as rendered (not parsed and printed again):
    the same row of aggregates as the formatted statement a plan file holds. Counts must be equal;
    sums are compared to 1e-12 relative, because DuckDB's parallel aggregation adds rows in an order
    that varies from run to run (seen on CI: the 14th significant digit moved)."""
    import shutil

    import duckdb

    from sqlmatch.engines.duckdb import DuckDBEngine
    from sqlmatch.plan import build_plan
    from sqlmatch.runner import run_plan

    shutil.copyfile(demo_dir / "bikeshare.duckdb", tmp_path / "bikeshare.duckdb")
    raw = tomllib.loads(DEMO_SPEC.read_text())
    raw["study"]["database"] = str(tmp_path / "bikeshare.duckdb")
    raw["matching"] = {"method": "score_weighting", "on": ["pre_trips", "pre_minutes", "age_band"]}
    spec = parse_spec(raw)
    with DuckDBEngine(str(tmp_path / "bikeshare.duckdb")) as engine:
        model = run_plan(build_plan(spec, "duckdb"), spec, engine, keep_tables=True).model
    moments = [Moment("pre_trips", "numeric", centre=7.25, scale=6.5), Moment("age_band", "level", level="25-34", centre=0.375, scale=0.5)]
    with duckdb.connect(str(tmp_path / "bikeshare.duckdb")) as con:
        for fast, formatted in (
            (propensity.newton_statements(spec, "duckdb", model.columns, model.coefficients),
             propensity.newton_statements(spec, "duckdb", model.columns, model.coefficients, transient=False)),
            (newton_statements(spec, "duckdb", moments, [0.25, -0.5]), newton_statements(spec, "duckdb", moments, [0.25, -0.5], transient=False)),
        ):
            assert fast != formatted  # the check compares two different texts
            for a, b in zip(fast, formatted):
                (row_fast,), (row_formatted,) = con.execute(a).fetchall(), con.execute(b).fetchall()
                assert len(row_fast) == len(row_formatted)
                for x, y in zip(row_fast, row_formatted):
                    if isinstance(x, int) and isinstance(y, int):
                        assert x == y
                    else:
                        assert float(x) == pytest.approx(float(y), rel=1e-12, abs=1e-12)
