"""Any open DB-API 2.0 connection plus a dialect name: for warehouses without an adapter of their
own (Snowflake, Trino, Redshift, ... through their Python drivers). Catalog look-ups use the SQL
standard's information_schema; the statements are the plan's, printed for `dialect`."""

from __future__ import annotations

from sqlglot import exp

from sqlmatch.dialects import check_dialect
from sqlmatch.engines.base import Engine, QueryResult
from sqlmatch.errors import EngineError


def _plain(value):
    """Driver-specific numbers (Decimal) become int or float, so results compare across engines."""
    from decimal import Decimal

    if isinstance(value, Decimal):
        return int(value) if value == value.to_integral_value() else float(value)
    return value


class DBAPIEngine(Engine):
    def __init__(self, connection, dialect: str):
        super().__init__()
        self.con = connection
        self.dialect = check_dialect(dialect, key="dialect")

    def execute(self, sql: str) -> int | None:
        cur = self.con.cursor()
        try:
            cur.execute(sql)
            count = getattr(cur, "rowcount", -1)
        except Exception as err:  # drivers share no error base class beyond DB-API's, which is per module
            raise EngineError(f"the {self.dialect} connection refused a statement: {str(err).splitlines()[0]}") from None
        finally:
            cur.close()
        self._commit()
        return count if isinstance(count, int) and count >= 0 else None

    def _commit(self) -> None:
        commit = getattr(self.con, "commit", None)
        if commit is not None:
            try:
                commit()
            except Exception:  # autocommit connections may refuse an explicit commit
                pass

    def _query(self, sql: str, params: tuple = ()) -> QueryResult:
        cur = self.con.cursor()
        try:
            cur.execute(sql)
            rows = cur.fetchall()
            cols = tuple(d[0] for d in cur.description)
        except Exception as err:
            raise EngineError(f"the {self.dialect} connection refused a query: {str(err).splitlines()[0]}") from None
        finally:
            cur.close()
        return QueryResult(columns=cols, rows=tuple(tuple(_plain(v) for v in r) for r in rows))

    def _catalog(self, table: str, columns: list[str], where: exp.Expression) -> QueryResult:
        query = exp.select(*columns).from_(exp.table_(table, db="information_schema")).where(where)
        return self._query(query.sql(self.dialect))

    def columns(self, schema: str | None, table: str) -> dict[str, str] | None:
        where = exp.column("table_name").eq(exp.Literal.string(table))
        if schema:
            where = where.and_(exp.column("table_schema").eq(exp.Literal.string(schema)))
        result = self._catalog("columns", ["column_name", "data_type"], where)
        return {name: str(dtype) for name, dtype in result.rows} or None

    def table_names(self, schema: str) -> list[str]:
        result = self._catalog("tables", ["table_name"], exp.column("table_schema").eq(exp.Literal.string(schema)))
        return sorted(r[0] for r in result.rows)
