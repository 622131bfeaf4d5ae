"""The engine interface. Adapters are the only code that talks to a database.

An adapter executes statements, returns the (small) result of aggregate queries, and reads
the catalog for preflight checks. It counts every result row it hands to Python in
`rows_fetched`, so a run can prove it never pulled row-level data.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass


@dataclass(frozen=True)
class QueryResult:
    columns: tuple[str, ...]
    rows: tuple[tuple, ...]

    def records(self) -> list[dict]:
        return [dict(zip(self.columns, row)) for row in self.rows]

    def one(self) -> dict:
        if len(self.rows) != 1:
            raise ValueError(f"expected one row, got {len(self.rows)}")
        return dict(zip(self.columns, self.rows[0]))


def merged(parts: list[QueryResult], what: str = "query") -> QueryResult:
    """The parts of one query split under the SELECT-list limit, as one result (columns.merge_parts)."""
    from sqlmatch.columns import merge_parts

    return QueryResult(*merge_parts([(p.columns, p.rows) for p in parts], what))


class Engine(ABC):
    dialect: str = ""
    transactional_ddl: bool = False  # DROP/ALTER can run inside BEGIN ... COMMIT

    def __init__(self) -> None:
        self.rows_fetched = 0

    @abstractmethod
    def execute(self, sql: str) -> int | None:
        """Run one statement that returns no result set; the number of rows it wrote when the
        driver reports it (for progress lines), else None."""

    def execute_atomic(self, statements: list[str]) -> None:
        """Run statements as one transaction where the engine allows DDL in transactions;
        elsewhere one after another (the swap then has a short window without the table)."""
        if not self.transactional_ddl:
            for sql in statements:
                self.execute(sql)
            return
        self.execute("BEGIN TRANSACTION")
        try:
            for sql in statements:
                self.execute(sql)
        except BaseException:
            self.execute("ROLLBACK")
            raise
        self.execute("COMMIT")

    @abstractmethod
    def _query(self, sql: str, params: tuple = ()) -> QueryResult: ...

    def fetch(self, sql: str, params: tuple = ()) -> QueryResult:
        """Run a query and return its rows, counting them."""
        result = self._query(sql, params)
        self.rows_fetched += len(result.rows)
        return result

    @abstractmethod
    def columns(self, schema: str | None, table: str) -> dict[str, str] | None:
        """Column name -> type of a table, or None when the table does not exist."""

    @abstractmethod
    def table_names(self, schema: str) -> list[str]:
        """Tables in a schema (used to find a study's leftover work tables)."""

    def study_lock(self, work_schema: str, study: str) -> AbstractContextManager:
        """A context manager the runner holds for the whole of one run of a study. Inside it no
        other run of the same study (work schema + name) may run on the same database: entering
        raises a SqlmatchError naming the study when another run holds it (fail fast, no waiting).
        Default: no lock. DuckDB needs none across processes (one process at a time opens a
        database file for writing); the PostgreSQL adapter takes an advisory lock."""
        return nullcontext()

    def session_time_zone(self, zone: str) -> AbstractContextManager:
        """A context manager that runs the statements inside it in a session whose time zone is
        `zone`, and gives the session its own setting back afterwards. The runner holds it for a
        whole run with zone "UTC": comparing a TIMESTAMPTZ with a window's first day, or casting
        it to a date, then means the same day on every engine and machine (DEVELOPERS.md).
        Default: nothing is set (an engine with no session time zone)."""
        return nullcontext()

    def schema_exists(self, schema: str) -> bool:
        """Whether the schema exists; the runner then skips CREATE SCHEMA IF NOT EXISTS, which
        PostgreSQL refuses to a user without CREATE on the database even when the schema is there.
        Default False: the statement runs (it is harmless where creating is allowed)."""
        return False

    def close(self) -> None:  # pragma: no cover - adapters override when they hold resources
        pass

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
