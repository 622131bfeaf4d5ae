"""DuckDB adapter: the embedded default engine."""

from __future__ import annotations

import duckdb

from sqlmatch.engines.base import Engine, QueryResult
from sqlmatch.errors import EngineError


class DuckDBEngine(Engine):
    dialect = "duckdb"
    transactional_ddl = True

    def __init__(self, database: str = ":memory:", connection: "duckdb.DuckDBPyConnection | None" = None):
        super().__init__()
        self.database = database
        if connection is not None:
            self.con = connection
            self._owns = False
        else:
            try:
                self.con = duckdb.connect(database)
            except duckdb.IOException as err:
                raise EngineError(
                    f"could not open DuckDB database {database!r}: {str(err).splitlines()[0]} "
                    "Fix: another process may hold it open for writing (DuckDB allows one writer); wait for it or use another file."
                ) from None
            self._owns = True
            # DuckDB draws its own progress bar for queries over 2 s, in the middle of
            # sqlmatch's per-step lines (a connection the caller passes keeps its settings)
            self.con.execute("SET enable_progress_bar = false")

    def execute(self, sql: str) -> int | None:
        try:
            cur = self.con.execute(sql)
            if cur.description and cur.description[0][0] == "Count":
                rows = cur.fetchall()  # rows written by CREATE TABLE AS / INSERT
                return int(rows[0][0]) if rows else None
            return None
        except duckdb.Error as err:
            raise EngineError(f"DuckDB refused a statement: {str(err).splitlines()[0]}") from err

    def _query(self, sql: str, params: tuple = ()) -> QueryResult:
        try:
            cur = self.con.execute(sql, params) if params else self.con.execute(sql)
            rows = cur.fetchall()
        except duckdb.Error as err:
            raise EngineError(f"DuckDB refused a query: {str(err).splitlines()[0]}") from err
        cols = tuple(d[0] for d in cur.description)
        return QueryResult(columns=cols, rows=tuple(tuple(r) for r in rows))

    def columns(self, schema: str | None, table: str) -> dict[str, str] | None:
        result = self._query(
            "SELECT column_name, data_type FROM information_schema.columns "
            "WHERE table_schema = ? AND table_name = ? ORDER BY ordinal_position",
            (schema or "main", table),
        )
        if not result.rows:
            return None
        return {name: dtype for name, dtype in result.rows}

    def table_names(self, schema: str) -> list[str]:
        result = self._query(
            "SELECT table_name FROM information_schema.tables WHERE table_schema = ? ORDER BY table_name",
            (schema,),
        )
        return [r[0] for r in result.rows]

    def close(self) -> None:
        if self._owns:
            self.con.close()
