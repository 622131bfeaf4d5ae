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


BUILDING_SUFFIX = "__building"

# Dialects whose ALTER TABLE ... RENAME TO resolves an unqualified new name in the session's
# current schema rather than the table's own: the new name is qualified there.
_QUALIFIED_RENAME = {"spark", "databricks", "snowflake", "trino"}


def building_name(table: exp.Table) -> exp.Table:
    building = table.copy()
    building.set("this", exp.to_identifier(table.name + BUILDING_SUFFIX, quoted=table.this.quoted))
    return building


def create_table_as(table: exp.Table, query: exp.Expression, dialect: str) -> list[exp.Expression]:
    """Build under a temporary name, then swap it in: readers and later steps never see a half-built
    table, and a run killed mid-step leaves only a `__building` table that the next run drops.

    DROP + CREATE TABLE AS (not CREATE OR REPLACE: it fails on PostgreSQL and on Spark's default
    catalog), then DROP the old table and RENAME the new one; the runner executes the last two in
    one transaction where the engine has transactional DDL (DuckDB, PostgreSQL)."""
    building = building_name(table)
    target = table.copy() if dialect in _QUALIFIED_RENAME else exp.Table(this=table.this.copy())
    return [
        exp.Drop(tables=[building.copy()], kind="TABLE", exists=True),
        exp.Create(this=building.copy(), kind="TABLE", expression=query),
        exp.Drop(tables=[table.copy()], kind="TABLE", exists=True),
        exp.Alter(this=building.copy(), kind="TABLE", actions=[exp.AlterRename(this=target)]),
    ]
