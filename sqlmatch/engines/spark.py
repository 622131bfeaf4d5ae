"""Spark adapter (pyspark): runs the plan compiled for the "spark" dialect.

`spark://local` starts a local session (two cores, no UI, two shuffle partitions, in-memory
catalog) whose warehouse and Derby home live in a temporary folder that is removed on close, so
nothing is written into the working folder. `sc://host:port` connects to a Spark Connect server
(needs `pip install 'pyspark[connect]'`). A session handed in by the caller is used as is and
never stopped here.
"""

from __future__ import annotations

import shutil
import socket
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from sqlmatch.engines import first_line, plain, redact
from sqlmatch.engines.base import Engine, QueryResult
from sqlmatch.errors import EngineError

LOCAL_URL = "spark://local"


def _driver_errors() -> tuple[type[BaseException], ...]:
    """Exceptions the driver raises for refused SQL or a broken session."""
    kinds: list[type[BaseException]] = []
    try:
        from pyspark.errors import PySparkException

        kinds.append(PySparkException)
    except ImportError:  # pragma: no cover - pyspark < 3.4
        pass
    try:
        from py4j.protocol import Py4JError

        kinds.append(Py4JError)
    except ImportError:  # pragma: no cover - Spark Connect client without py4j
        pass
    return tuple(kinds)


def _quote(name: str) -> str:
    return "`" + name.replace("`", "``") + "`"


class SparkEngine(Engine):
    dialect = "spark"

    def __init__(self, url: str = LOCAL_URL, session=None):
        super().__init__()
        self.url = url
        self._tmp: Path | None = None
        self._owns = False
        try:
            from pyspark.sql import SparkSession
        except ImportError:
            raise EngineError(
                "Spark needs pyspark, which is not installed. Fix: pip install 'sqlmatch[spark]' (and Java 17 or newer for spark://local)."
            ) from None
        self._errors = _driver_errors()
        if session is not None:
            self.spark = session
            return
        if url == LOCAL_URL:
            active = SparkSession.getActiveSession()
            if active is not None:
                self.spark = active
                return
            self.spark = self._start_local(SparkSession)
        elif url.startswith("sc://"):
            self.spark = self._connect(SparkSession)
        else:
            raise EngineError(f"unknown Spark URL {redact(url, url)!r}: use {LOCAL_URL} or sc://host:port.")
        self._owns = True

    def _start_local(self, SparkSession):
        self._tmp = Path(tempfile.mkdtemp(prefix="sqlmatch-spark-"))
        warehouse = self._tmp / "warehouse"
        derby = self._tmp / "derby"
        derby.mkdir()
        builder = (
            SparkSession.builder.master("local[2]")
            .appName("sqlmatch")
            .config("spark.ui.enabled", "false")
            .config("spark.ui.showConsoleProgress", "false")
            .config("spark.sql.shuffle.partitions", "2")
            .config("spark.sql.warehouse.dir", str(warehouse))
            .config("spark.sql.catalogImplementation", "in-memory")
            # CREATE TABLE AS without USING makes a data-source table, as on Spark 4 (Spark 3.5
            # would otherwise ask for Hive support).
            .config("spark.sql.legacy.createHiveTableByDefault", "false")
            .config("spark.driver.extraJavaOptions", f"-Dderby.system.home={derby}")
        )
        try:
            spark = builder.getOrCreate()
        except Exception as err:  # the JVM did not start: no Java, or no memory
            self._remove_tmp()
            raise EngineError(
                f"could not start a local Spark session: {first_line(err)} Fix: install Java 17 or newer and check JAVA_HOME."
            ) from None
        spark.sparkContext.setLogLevel("ERROR")
        return spark

    def _connect(self, SparkSession):
        # The Connect client retries an unreachable server for minutes; find out at once instead.
        authority = self.url[len("sc://") :].split("/", 1)[0].split(";", 1)[0]
        host, _, port = authority.rpartition(":") if ":" in authority else (authority, "", "15002")
        try:
            socket.create_connection((host.strip("[]"), int(port)), timeout=10).close()
        except (OSError, ValueError) as err:
            raise EngineError(
                f"could not reach Spark Connect at {redact(self.url, self.url)}: {redact(first_line(err), self.url)} "
                "Fix: check host and port (default 15002) and that the server is running."
            ) from None
        try:
            return SparkSession.builder.remote(self.url).getOrCreate()
        except ImportError as err:
            raise EngineError(
                f"Spark Connect needs extra packages ({first_line(err)}). Fix: pip install 'pyspark[connect]'."
            ) from None
        except Exception as err:
            raise EngineError(
                f"could not connect to Spark Connect at {redact(self.url, self.url)}: {redact(first_line(err), self.url)}"
            ) from None

    def _message(self, err: BaseException) -> str:
        return redact(first_line(err), self.url)

    def execute(self, sql: str) -> None:
        try:
            self.spark.sql(sql)
        except self._errors as err:
            raise EngineError(f"Spark refused a statement: {self._message(err)}") from None

    def _query(self, sql: str, params: tuple = ()) -> QueryResult:
        try:
            df = self.spark.sql(sql, args=list(params)) if params else self.spark.sql(sql)
            cols = tuple(df.columns)
            rows = df.collect()
        except self._errors as err:
            raise EngineError(f"Spark refused a query: {self._message(err)}") from None
        return QueryResult(columns=cols, rows=tuple(tuple(plain(v) for v in row) for row in rows))

    def _name(self, schema: str | None, table: str) -> str:
        return f"{_quote(schema)}.{_quote(table)}" if schema else _quote(table)

    def columns(self, schema: str | None, table: str) -> dict[str, str] | None:
        from pyspark.errors import AnalysisException

        try:
            fields = self.spark.table(self._name(schema, table)).schema.fields
        except AnalysisException:
            return None
        except self._errors as err:
            raise EngineError(f"Spark could not read the catalog: {self._message(err)}") from None
        return {f.name: f.dataType.simpleString() for f in fields}

    def table_names(self, schema: str) -> list[str]:
        from pyspark.errors import AnalysisException

        try:
            tables = self.spark.catalog.listTables(schema)
        except AnalysisException:
            return []
        except self._errors as err:
            raise EngineError(f"Spark could not read the catalog: {self._message(err)}") from None
        return sorted(t.name for t in tables if not t.isTemporary)

    def _remove_tmp(self) -> None:
        if self._tmp is not None:
            shutil.rmtree(self._tmp, ignore_errors=True)
            self._tmp = None

    @contextmanager
    def session_time_zone(self, zone: str) -> Iterator[None]:
        key = "spark.sql.session.timeZone"
        before = self.spark.conf.get(key)
        self.spark.conf.set(key, zone)
        try:
            yield
        finally:
            self.spark.conf.set(key, before)

    def close(self) -> None:
        if self._owns:
            self._owns = False
            try:
                self.spark.stop()
            finally:
                self._remove_tmp()
