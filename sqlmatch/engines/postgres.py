"""PostgreSQL adapter (psycopg 3): runs the plan compiled for the "postgres" dialect.

The connection is in autocommit mode: every statement of the plan commits on its own, as on
DuckDB, so a refused statement does not leave the session in an aborted transaction and the
runner can still drop the study's work tables. Credentials never appear in error messages.
"""

from __future__ import annotations

from sqlmatch.engines import first_line, plain, redact
from sqlmatch.engines.base import Engine, QueryResult
from sqlmatch.errors import EngineError

try:
    import psycopg
except ImportError:  # pragma: no cover - exercised only without the extra installed
    psycopg = None


class PostgresEngine(Engine):
    dialect = "postgres"

    def __init__(self, url: str | None = None, connection: "psycopg.Connection | None" = None, connect_timeout: int = 10):
        super().__init__()
        self.url = url or ""
        if connection is not None:
            self.con = connection
            self._owns = False
            return
        if psycopg is None:
            raise EngineError(
                "PostgreSQL needs the psycopg driver, which is not installed. "
                "Fix: pip install 'sqlmatch[postgres]' (or pip install 'psycopg[binary]')."
            )
        try:
            self.con = psycopg.connect(self.url, autocommit=True, connect_timeout=connect_timeout)
        except psycopg.Error as err:
            raise EngineError(
                f"could not connect to PostgreSQL at {self._shown()}: {self._message(err)} "
                "Fix: check host, port, database and user; the password comes from the URL, PGPASSWORD or ~/.pgpass."
            ) from None
        self._owns = True

    def _shown(self) -> str:
        return redact(self.url, self.url) if self.url else "(connection)"

    def _message(self, err: BaseException) -> str:
        return redact(first_line(err), self.url)

    def execute(self, sql: str) -> None:
        try:
            with self.con.cursor() as cur:
                cur.execute(sql)
        except psycopg.Error as err:
            raise EngineError(f"PostgreSQL refused a statement: {self._message(err)}") from None

    def _query(self, sql: str, params: tuple = ()) -> QueryResult:
        try:
            with self.con.cursor() as cur:
                if params:
                    cur.execute(sql, params)
                else:
                    cur.execute(sql)
                rows = cur.fetchall()
                cols = tuple(d.name for d in cur.description)
        except psycopg.Error as err:
            raise EngineError(f"PostgreSQL refused a query: {self._message(err)}") from None
        return QueryResult(columns=cols, rows=tuple(tuple(plain(v) for v in row) for row in rows))

    def columns(self, schema: str | None, table: str) -> dict[str, str] | None:
        # to_regclass resolves an unqualified name through search_path, as the compiled SQL does.
        if schema:
            target = "to_regclass(quote_ident(%s) || '.' || quote_ident(%s))"
            params: tuple = (schema, table)
        else:
            target = "to_regclass(quote_ident(%s))"
            params = (table,)
        result = self._query(
            "SELECT a.attname, format_type(a.atttypid, a.atttypmod) FROM pg_catalog.pg_attribute AS a "
            f"WHERE a.attrelid = {target} AND a.attnum > 0 AND NOT a.attisdropped ORDER BY a.attnum",
            params,
        )
        if not result.rows:
            return None
        return {name: dtype for name, dtype in result.rows}

    def table_names(self, schema: str) -> list[str]:
        result = self._query(
            "SELECT c.relname FROM pg_catalog.pg_class AS c JOIN pg_catalog.pg_namespace AS n ON n.oid = c.relnamespace "
            "WHERE n.nspname = %s AND c.relkind IN ('r', 'p', 'v', 'm', 'f') ORDER BY c.relname",
            (schema,),
        )
        return [r[0] for r in result.rows]

    def close(self) -> None:
        if self._owns and not self.con.closed:
            self.con.close()
