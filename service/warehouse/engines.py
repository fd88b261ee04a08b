"""Engine adapters: bind the configured tables or files, describe columns, run the cube query.

Each adapter opens a session whose time zone is UTC (the query reads naive timestamps as UTC)
and imports its driver only when opened, so the command line starts fast. Engine failures are
raised as :class:`InputError` naming the config key (``warehouse.url``, ``exposures.files``)
whose value the engine refused.
"""

from __future__ import annotations

import contextlib
import re
from collections.abc import Iterator
from typing import Any, Protocol

from detectors.errors import InputError, Problem

from .config import PullConfig
from .query import EXPOSURES_VIEW, Dialect, metric_view


class Engine(Protocol):
    dialect: Dialect

    def bind(self, view: str, files: str | None, table: str | None, key: str) -> str: ...

    def column_types(self, relation: str, key: str) -> dict[str, str]: ...

    def fetch(self, sql: str) -> list[tuple[Any, ...]]: ...

    def close(self) -> None: ...


@contextlib.contextmanager
def open_engine(config: PullConfig) -> Iterator[Engine]:
    url = config.warehouse.url
    engine: Engine
    if config.warehouse.engine == "duckdb":
        engine = DuckDBEngine(url)
    elif config.warehouse.engine == "postgres":
        engine = PostgresEngine(url)
    else:
        engine = SparkEngine(url)
    try:
        yield engine
    finally:
        engine.close()


def bind_relations(engine: Engine, config: PullConfig) -> dict[str, str]:
    """Bind every relation of the config; the name the query should read each one by."""
    names = {EXPOSURES_VIEW: engine.bind(EXPOSURES_VIEW, config.exposures.files,
                                         config.exposures.table, "exposures")}
    for k, metric in enumerate(config.metrics):
        names[metric_view(k)] = engine.bind(metric_view(k), metric.files, metric.table,
                                            f"metrics[{k}]")
    return names


def _refused(key: str, error: Exception) -> InputError:
    text = " ".join(str(error).split())
    return InputError([Problem(key, text[:500])])


def _files_kind(files: str, key: str) -> str:
    lowered = files.lower()
    if re.search(r"\.parquet$|\.parq$", lowered):
        return "parquet"
    if re.search(r"\.(csv|tsv)(\.gz|\.zst)?$", lowered):
        return "csv"
    raise InputError([Problem(f"{key}.files", f"{files!r}: name Parquet (.parquet) or CSV "
                              "(.csv) files")])


def _quoted(name: str, quote: str = '"') -> str:
    return ".".join(f"{quote}{part}{quote}" for part in name.split("."))


class DuckDBEngine:
    """In-process DuckDB: ``duckdb://`` (memory, for files) or ``duckdb:///PATH`` (a
    database file, opened read-only)."""

    dialect: Dialect = "duckdb"

    def __init__(self, url: str) -> None:
        import duckdb

        path = url.partition("://")[2]
        try:
            self._connection = (duckdb.connect(path, read_only=True) if path
                                else duckdb.connect())
            self._connection.execute("SET TimeZone = 'UTC'")
        except duckdb.Error as error:
            raise _refused("warehouse.url", error) from None
        self._error = duckdb.Error

    def bind(self, view: str, files: str | None, table: str | None, key: str) -> str:
        if table is not None:
            return table
        assert files is not None
        kind = _files_kind(files, key)
        reader = "read_parquet" if kind == "parquet" else "read_csv"
        literal = "'" + files.replace("'", "''") + "'"
        try:
            self._connection.execute(
                f'CREATE OR REPLACE TEMP VIEW "{view}" AS SELECT * FROM {reader}({literal})')
        except self._error as error:
            raise _refused(f"{key}.files", error) from None
        return view

    def column_types(self, relation: str, key: str) -> dict[str, str]:
        try:
            described = self._connection.execute(
                f"DESCRIBE SELECT * FROM {_quoted(relation)}").fetchall()
        except self._error as error:
            raise _refused(f"{key}.table", error) from None
        return {str(row[0]): str(row[1]).lower() for row in described}

    def fetch(self, sql: str) -> list[tuple[Any, ...]]:
        try:
            return self._connection.execute(sql).fetchall()
        except self._error as error:
            raise _refused("warehouse", error) from None

    def close(self) -> None:
        self._connection.close()


class PostgresEngine:
    """PostgreSQL through psycopg, in a read-only session; tables only."""

    dialect: Dialect = "postgres"

    def __init__(self, url: str) -> None:
        try:
            import psycopg
        except ImportError:
            raise InputError([Problem("warehouse.url", "PostgreSQL needs psycopg: pip install "
                                      "'inrush[postgres]'")]) from None
        from sqlalchemy.engine import make_url

        libpq = make_url(url).set(drivername="postgresql").render_as_string(
            hide_password=False)
        try:
            # Autocommit: each statement its own transaction, read-only for the session, so a
            # failed statement leaves the session settings in place.
            self._connection = psycopg.connect(libpq, connect_timeout=10, autocommit=True)
            self._connection.execute("SET TIME ZONE 'UTC'")
            self._connection.execute("SET SESSION CHARACTERISTICS AS TRANSACTION READ ONLY")
        except psycopg.Error as error:
            raise _refused("warehouse.url", error) from None
        self._error = psycopg.Error

    def bind(self, view: str, files: str | None, table: str | None, key: str) -> str:
        if table is None:
            raise InputError([Problem(f"{key}.files", "PostgreSQL reads tables: give `table`, "
                                      "or use duckdb:// for files")])
        return table

    def column_types(self, relation: str, key: str) -> dict[str, str]:
        try:
            cursor = self._connection.execute(f"SELECT * FROM {_quoted(relation)} LIMIT 0")
        except self._error as error:
            raise _refused(f"{key}.table", error) from None
        types = self._connection.adapters.types
        result = {}
        for column in cursor.description or []:
            info = types.get(column.type_code)
            result[column.name] = info.name if info is not None else str(column.type_code)
        return result

    def fetch(self, sql: str) -> list[tuple[Any, ...]]:
        try:
            return self._connection.execute(sql).fetchall()
        except self._error as error:
            raise _refused("warehouse", error) from None

    def close(self) -> None:
        self._connection.close()


class SparkEngine:
    """Spark SQL through PySpark: ``spark://local[*]`` runs in-process, ``spark://HOST:PORT``
    on a standalone cluster; files and catalog tables."""

    dialect: Dialect = "spark"

    def __init__(self, url: str) -> None:
        try:
            from pyspark.sql import SparkSession
        except ImportError:
            raise InputError([Problem("warehouse.url", "Spark needs PySpark: pip install "
                                      "'inrush[spark]' (and Java 17 or later)")]) from None
        rest = url.partition("://")[2]
        master = rest if rest.startswith("local") else f"spark://{rest}"
        try:
            self._spark = (SparkSession.builder.master(master).appName("inrush-pull")
                           .config("spark.sql.session.timeZone", "UTC")
                           .config("spark.ui.enabled", "false")
                           .config("spark.ui.showConsoleProgress", "false").getOrCreate())
            self._spark.sparkContext.setLogLevel("ERROR")
        except Exception as error:
            raise _refused("warehouse.url", error) from None
        # A session shared with the caller keeps its own zone afterwards.
        self._spark.conf.set("spark.sql.session.timeZone", "UTC")

    def bind(self, view: str, files: str | None, table: str | None, key: str) -> str:
        if table is not None:
            return table
        assert files is not None
        reader = self._spark.read
        try:
            frame = (reader.parquet(files) if _files_kind(files, key) == "parquet"
                     else reader.csv(files, header=True, inferSchema=True))
        except Exception as error:
            raise _refused(f"{key}.files", error) from None
        frame.createOrReplaceTempView(view)
        return view

    def column_types(self, relation: str, key: str) -> dict[str, str]:
        try:
            frame = self._spark.table(_quoted(relation, "`"))
        except Exception as error:
            raise _refused(f"{key}.table", error) from None
        return {name: kind.lower() for name, kind in frame.dtypes}

    def fetch(self, sql: str) -> list[tuple[Any, ...]]:
        try:
            return [tuple(row) for row in self._spark.sql(sql).collect()]
        except Exception as error:
            raise _refused("warehouse", error) from None

    def close(self) -> None:
        """The session stays up: PySpark shares one per process, and its start-up is slow."""
