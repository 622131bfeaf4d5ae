"""Target dialects: parse a rendered template and print it for the engine that will run it.

Templates stay inside the subset of SQL that means the same on DuckDB, PostgreSQL and
Spark (see DEVELOPERS.md); this module only prints. A dialect that needs a different
construct gets its own template under sql_templates/<dialect>/, not a rewrite here.
"""

from __future__ import annotations

import difflib

import sqlglot
from sqlglot import exp
from sqlglot.errors import ErrorLevel

from sqlmatch.errors import SqlmatchError

# Executed in the test suite: duckdb. Compiled (golden files) for all of these.
DIALECTS = ("duckdb", "postgres", "spark", "databricks", "snowflake", "bigquery", "trino", "redshift")


def check_dialect(name: str, key: str = "--dialect") -> str:
    if name in DIALECTS:
        return name
    close = difflib.get_close_matches(name, DIALECTS, n=1)
    hint = f" Did you mean {close[0]!r}?" if close else ""
    raise SqlmatchError(f"{key}: unknown dialect {name!r}.{hint} Known dialects: {', '.join(DIALECTS)}.")


def parse(sql: str, read: str) -> list[exp.Expression]:
    return [s for s in sqlglot.parse(sql, read=read) if s is not None]


def generate(tree: exp.Expression, dialect: str) -> str:
    """Pretty, deterministic SQL for one statement; unsupported constructs raise instead of passing."""
    return tree.sql(dialect=dialect, pretty=True, unsupported_level=ErrorLevel.RAISE)


def create_table_as(table: exp.Table, query: exp.Expression) -> list[exp.Expression]:
    """DROP + CREATE TABLE AS: the form that behaves the same on DuckDB, PostgreSQL and Spark
    (CREATE OR REPLACE fails on PostgreSQL and on Spark's default catalog)."""
    drop = exp.Drop(tables=[table.copy()], kind="TABLE", exists=True)
    create = exp.Create(this=table.copy(), kind="TABLE", expression=query)
    return [drop, create]
