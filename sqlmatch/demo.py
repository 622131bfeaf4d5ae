"""Demo warehouse: an invented city bike-share whose riders may buy an annual pass.

The SQL lives in ``demo_warehouse/generate.sql.j2`` (shipped as package data of
``sqlmatch.demo_warehouse``); its header documents the data-generating process. This module only
renders that template and hands the statements, one by one, to a caller-supplied executor: it never
opens a database connection itself and never sees row-level data.

Example with DuckDB::

    import duckdb
    from sqlmatch.demo import build_demo_warehouse

    con = duckdb.connect("demo.duckdb")
    build_demo_warehouse(con.execute, riders=20_000)
"""

from __future__ import annotations

import importlib.resources
from pathlib import Path
from typing import Any, Callable

import jinja2

TEMPLATE_NAME = "generate.sql.j2"
TEMPLATE_PACKAGE = "sqlmatch.demo_warehouse"

#: Marker line between statements in the rendered template.
STATEMENT_SEPARATOR = "-- statement"

#: Tables the generator writes into the ``main`` schema.
DEMO_RIDERS_TABLE = "riders"
DEMO_TRIPS_TABLE = "trips"
DEMO_TRUTH_TABLE = "demo_truth"
DEMO_META_TABLE = "demo_meta"

#: The study the truth refers to (the template writes the same values into demo_meta).
DEMO_COHORT = "2026-03"
DEMO_PRE_WINDOW = ("2025-09-01", "2026-02-28")
DEMO_POST_WINDOW = ("2026-04-01", "2026-06-30")
DEMO_OUTCOMES = ("post_trips", "post_minutes", "post_fare", "fare_per_trip", "active_last_month")

DEFAULT_RIDERS = 20_000
DEFAULT_SEED = 20260301

_MAX_SEED = 2**63 - 1


def load_template_text() -> str:
    """Read the generator template from the installed package, else from the repository."""
    try:
        resource = importlib.resources.files(TEMPLATE_PACKAGE).joinpath(TEMPLATE_NAME)
        if resource.is_file():
            return resource.read_text(encoding="utf-8")
    except (ModuleNotFoundError, FileNotFoundError, NotADirectoryError, TypeError):
        pass
    # Running from a source checkout: sqlmatch/ sits at <repo>/sqlmatch, the template at
    # <repo>/demo_warehouse/.
    fallback = Path(__file__).resolve().parents[1] / "demo_warehouse" / TEMPLATE_NAME
    return fallback.read_text(encoding="utf-8")


def _check_int(name: str, value: Any, low: int, high: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        raise TypeError(f"{name} must be an int, got {type(value).__name__}")
    if not low <= value <= high:
        raise ValueError(f"{name} must be between {low} and {high}, got {value}")
    return int(value)


def split_statements(rendered: str) -> list[str]:
    """Split rendered SQL on lines that hold only the separator marker.

    Chunks that contain nothing but whitespace and ``--`` comment lines are dropped.
    """
    chunks: list[list[str]] = [[]]
    for line in rendered.splitlines():
        if line.strip() == STATEMENT_SEPARATOR:
            chunks.append([])
        else:
            chunks[-1].append(line)
    statements = []
    for chunk in chunks:
        code_lines = [ln for ln in chunk if ln.strip() and not ln.strip().startswith("--")]
        if code_lines:
            statements.append("\n".join(chunk).strip())
    return statements


def _environment() -> jinja2.Environment:
    return jinja2.Environment(
        undefined=jinja2.StrictUndefined,
        autoescape=False,
        keep_trailing_newline=True,
    )


def template_module(riders: int = DEFAULT_RIDERS, seed: int = DEFAULT_SEED) -> Any:
    """The template as a jinja2 module, exposing its macros (unif, normal, poisson, ...).

    Meant for checking the building blocks of the generator in isolation.
    """
    riders = _check_int("riders", riders, 1, 10**10)
    seed = _check_int("seed", seed, 0, _MAX_SEED)
    return _environment().from_string(load_template_text()).make_module({"riders": riders, "seed": seed})


def render_demo_sql(riders: int = DEFAULT_RIDERS, seed: int = DEFAULT_SEED) -> str:
    """The rendered template as one text (statements separated by marker lines)."""
    riders = _check_int("riders", riders, 1, 10**10)
    seed = _check_int("seed", seed, 0, _MAX_SEED)
    template = _environment().from_string(load_template_text())
    return template.render(riders=riders, seed=seed)


def demo_statements(riders: int = DEFAULT_RIDERS, seed: int = DEFAULT_SEED) -> list[str]:
    """DuckDB statements that (re)build riders, trips, demo_truth and demo_meta, in order."""
    return split_statements(render_demo_sql(riders=riders, seed=seed))


def build_demo_warehouse(
    execute: Callable[[str], Any],
    riders: int = DEFAULT_RIDERS,
    seed: int = DEFAULT_SEED,
) -> int:
    """Run the generator statements through ``execute`` (one SQL string per call).

    Returns the number of statements executed.
    """
    statements = demo_statements(riders=riders, seed=seed)
    for statement in statements:
        execute(statement)
    return len(statements)
