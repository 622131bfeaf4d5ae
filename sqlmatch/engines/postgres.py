"""PostgreSQL adapter (psycopg 3): runs the plan compiled for the "postgres" dialect.

The connection is in autocommit mode: every statement of the plan commits on its own, as on
DuckDB, so a refused statement does not leave the session in an aborted transaction and the
runner can still drop the study's work tables. Credentials never appear in error messages.

One run of a study at a time: `study_lock` takes a session-level advisory lock keyed on the work
schema and study name for the whole run, so a second run of the same study on the same database
fails fast instead of dropping the first run's `__building` tables (see runner.run_plan). The server
releases the lock when the session ends, so a killed run never leaves it held.
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Iterator
from contextlib import contextmanager

from sqlmatch.engines import first_line, plain, redact
from sqlmatch.engines.base import Engine, QueryResult
from sqlmatch.errors import EngineError

try:
    import psycopg
except ImportError:  # pragma: no cover - exercised only without the extra installed
    psycopg = None

# CREATE SCHEMA / TABLE ... IF NOT EXISTS, after any leading comments (see execute).
_CREATE_IF_NOT_EXISTS = re.compile(r"\s*(?:/\*.*?\*/\s*|--[^\n]*\n\s*)*CREATE\s+(?:SCHEMA|TABLE)\s+IF\s+NOT\s+EXISTS\b", re.S | re.I)


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
        # sqlmatch's aggregate queries are wide (hundreds of sums, one row): JIT compiling them cost
        # more than running them (the weighting sandwich on 16,177 rows: 3.5 s without JIT, 16 s with
        # it, minutes once the cost estimate turned on JIT optimisation). This session only.
        self._execute("SET jit = off")
        self._owns = True

    def _shown(self) -> str:
        return redact(self.url, self.url) if self.url else "(connection)"

    def _message(self, err: BaseException) -> str:
        return redact(first_line(err), self.url)

    def execute(self, sql: str) -> None:
        try:
            self._execute(sql)
        except psycopg.errors.UniqueViolation as err:
            # CREATE ... IF NOT EXISTS is not atomic in PostgreSQL: two sessions creating the same
            # schema at once (two studies sharing a new work schema) can both find it missing, and
            # the later one then fails on the catalog's unique index once the other commits. The
            # statement is idempotent and the other object is committed by then, so run it once
            # more (outside a transaction only): it now finds the object and does nothing.
            idle = self.con.info.transaction_status == psycopg.pq.TransactionStatus.IDLE
            if not (idle and _CREATE_IF_NOT_EXISTS.match(sql)):
                raise EngineError(f"PostgreSQL refused a statement: {self._message(err)}") from None
            try:
                self._execute(sql)
            except psycopg.Error as again:
                raise EngineError(f"PostgreSQL refused a statement: {self._message(again)}") from None
        except psycopg.Error as err:
            raise EngineError(f"PostgreSQL refused a statement: {self._message(err)}") from None

    def _execute(self, sql: str) -> None:
        with self.con.cursor() as cur:
            cur.execute(sql)

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

    @contextmanager
    def study_lock(self, work_schema: str, study: str) -> Iterator[None]:
        key = study_lock_key(work_schema, study)
        if not self._query("SELECT pg_try_advisory_lock(%s)", (key,)).rows[0][0]:
            pid, what = self._lock_holder(key)
            if pid is None:
                fix = "Fix: wait until that run ends and run again, or give this run its own [study] name or work_schema."
            else:
                # A killed run's backend keeps running its last statement, and holds the lock, until
                # the statement ends; only the server can tell whether a client is still behind it.
                fix = (
                    f"Fix: if no sqlmatch run of this study is still going, the holder is an earlier run that was killed while its "
                    f"statement still runs on the server: end that session with SELECT pg_terminate_backend({pid}); "
                    f"(as a superuser or the user that session runs as), then run again. Otherwise wait until that run ends, or give this run its "
                    "own [study] name or work_schema."
                )
            raise EngineError(
                f"study {study!r} (work schema {work_schema!r}) is already being run on this database by another "
                f"session{what}; two runs of one study would drop and replace each other's tables. " + fix
            )
        try:
            yield
        finally:
            try:
                self._query("SELECT pg_advisory_unlock(%s)", (key,))
            except EngineError:
                pass  # the session is gone (and the server released its locks with it)

    def _lock_holder(self, key: int) -> tuple[int | None, str]:
        """The pid of the session holding the lock and ' (PostgreSQL backend pid N, ...)' saying
        what it is doing, when the catalog shows it; (None, "") otherwise."""
        unsigned = key & 0xFFFFFFFFFFFFFFFF
        try:
            rows = self._query(
                "SELECT l.pid, a.state, CAST(a.state_change AS VARCHAR) "
                "FROM pg_catalog.pg_locks AS l LEFT JOIN pg_catalog.pg_stat_activity AS a ON a.pid = l.pid "
                "WHERE l.locktype = 'advisory' AND l.granted AND l.objsubid = 1 "
                "AND l.database = (SELECT oid FROM pg_catalog.pg_database WHERE datname = current_database()) "
                "AND l.classid::bigint = %s AND l.objid::bigint = %s",
                (unsigned >> 32, unsigned & 0xFFFFFFFF),
            ).rows
        except EngineError:
            return None, ""
        if not rows:
            return None, ""
        pid, state, since = rows[0]
        doing = f", {state} since {str(since)[:19]}" if state and since else ""
        return int(pid), f" (PostgreSQL backend pid {pid}{doing})"

    @contextmanager
    def session_time_zone(self, zone: str) -> Iterator[None]:
        (before,) = self._query("SELECT current_setting('TimeZone')").rows[0]
        self._query("SELECT set_config('TimeZone', %s, false)", (zone,))
        try:
            yield
        finally:
            try:
                self._query("SELECT set_config('TimeZone', %s, false)", (before,))
            except EngineError:
                pass  # the session is gone, and its setting with it

    def schema_exists(self, schema: str) -> bool:
        return bool(self._query("SELECT 1 FROM pg_catalog.pg_namespace WHERE nspname = %s", (schema,)).rows)

    def close(self) -> None:
        if self._owns and not self.con.closed:
            self.con.close()


def study_lock_key(work_schema: str, study: str) -> int:
    """The advisory lock key of a study: a signed 64-bit hash (BLAKE2b, 8 bytes) of the work schema and
    study name, stable across processes and versions (Python's hash() is salted per process)."""
    digest = hashlib.blake2b(f"{work_schema}\x00{study}".encode("utf-8"), digest_size=8, person=b"sqlmatch").digest()
    return int.from_bytes(digest, "big", signed=True)
