"""Engines: open one from a URL (`--engine`), and helpers the adapters share.

Drivers are imported only when their scheme is asked for, so a DuckDB user needs neither psycopg
nor pyspark installed.

    duckdb:///abs/path.db        DuckDB file (duckdb://rel/path.db is relative to the working folder)
    duckdb://:memory:            in-memory DuckDB
    postgresql://user@host:port/db   PostgreSQL via psycopg 3 (postgres:// too); the password comes
                                 from the URL, PGPASSWORD or ~/.pgpass, as libpq reads them
    spark://local                a local Spark session (local[2]) with a temporary warehouse
    sc://host:port               Spark Connect
"""

from __future__ import annotations

import decimal
import os
import re
from pathlib import Path
from urllib.parse import unquote

from sqlmatch.engines.base import Engine
from sqlmatch.errors import EngineError, SqlmatchError

SCHEMES = ("duckdb://", "postgresql://", "spark://local", "sc://")

_SECRET_PARAM = re.compile(r"(?i)([?&;](?:password|token)=)([^&;#]*)")


def _secrets(url: str) -> set[str]:
    """The password (as written and decoded) and token parameters of a URL, and PGPASSWORD."""
    found: set[str] = set()
    if "://" in url:
        rest = url.split("://", 1)[1]
        authority = re.split(r"[/?]", rest, maxsplit=1)[0]
        if "@" in authority:
            userinfo = authority.rsplit("@", 1)[0]
            if ":" in userinfo:
                found.add(userinfo.split(":", 1)[1])
    found.update(m.group(2) for m in _SECRET_PARAM.finditer(url))
    found.update({unquote(s) for s in found})
    env = os.environ.get("PGPASSWORD")
    if env:
        found.add(env)
    return {s for s in found if s}


def redact(text: str, url: str) -> str:
    """`text` with every credential of `url` (and PGPASSWORD) replaced by ***."""
    for secret in sorted(_secrets(url), key=len, reverse=True):
        text = text.replace(secret, "***")
    return text


def first_line(err: BaseException) -> str:
    """The first non-empty line of an exception's message (drivers add hints and plans below it)."""
    for line in str(err).splitlines():
        if line.strip():
            return line.strip()
    return type(err).__name__


def plain(value):
    """A fetched value as DuckDB's adapter would hand it over: NUMERIC/DECIMAL becomes int when
    it has no fractional digits (sums of integers) and float otherwise, so numbers compare equal
    across engines and feed numpy without surprises."""
    if isinstance(value, decimal.Decimal):
        if value.is_finite() and value == value.to_integral_value() and value.as_tuple().exponent >= 0:
            return int(value)
        return float(value)
    return value


def open_engine_url(url: str) -> Engine:
    """The engine an `--engine` URL names; unknown schemes are refused with the known ones."""
    if not isinstance(url, str) or not url.strip():
        raise SqlmatchError(f"--engine: expected a URL such as duckdb:///warehouse.duckdb; known schemes: {', '.join(SCHEMES)}.")
    url = url.strip()
    scheme = url.split("://", 1)[0].lower() if "://" in url else ""
    if scheme == "duckdb":
        return _duckdb(url)
    if scheme in ("postgresql", "postgres"):
        from sqlmatch.engines.postgres import PostgresEngine

        return PostgresEngine(url)
    if scheme == "spark":
        if url.lower() != "spark://local":
            raise SqlmatchError(
                f"--engine: {redact(url, url)!r} is not supported; use spark://local for a local Spark session "
                "or sc://host:port for a Spark Connect server."
            )
        from sqlmatch.engines.spark import SparkEngine

        return SparkEngine("spark://local")
    if scheme == "sc":
        from sqlmatch.engines.spark import SparkEngine

        return SparkEngine(url)
    shown = redact(url, url)
    raise SqlmatchError(
        f"--engine: unknown engine URL {shown!r}. Known schemes: {', '.join(SCHEMES)} "
        "(e.g. duckdb:///path/warehouse.duckdb, postgresql://user@host:5432/db, spark://local, sc://host:15002)."
    )


def _duckdb(url: str) -> Engine:
    from sqlmatch.engines.duckdb import DuckDBEngine

    target = url.split("://", 1)[1]
    if target in (":memory:", ""):
        return DuckDBEngine(":memory:")
    path = Path(target)
    if not path.exists():
        raise EngineError(
            f"--engine: DuckDB file {str(path)!r} does not exist. Fix: check the path "
            "(duckdb:///abs/path.duckdb for an absolute path, duckdb://rel/path.duckdb for a relative one)."
        )
    return DuckDBEngine(str(path))


__all__ = ["Engine", "SCHEMES", "open_engine_url", "redact", "first_line", "plain"]
