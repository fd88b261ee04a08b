"""The same unit-level data gives the same cube on DuckDB, PostgreSQL and Spark, equal to an
independent pandas aggregation (``pulldata.reference_cube``) of the documented semantics."""

from __future__ import annotations

import io
import shutil
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest

from service.warehouse.config import parse_config
from service.warehouse.pull import PullResult, run_pull
from tests.backends import libpq, postgres_database, postgres_problem
from tests.warehouse.pulldata import (
    AS_OF,
    CONFIG,
    assert_matches_reference,
    reference_crossed,
    reference_cube,
    unit_data,
    write_parquet,
)


@pytest.fixture(scope="module")
def data() -> tuple[pd.DataFrame, pd.DataFrame]:
    return unit_data()


@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory,
          data: tuple[pd.DataFrame, pd.DataFrame]) -> Path:
    folder = tmp_path_factory.mktemp("pull")
    write_parquet(folder, *data)
    return folder


@pytest.fixture(scope="module")
def naive_files(files: Path) -> Path:
    """The exposures again with timestamps without time zone (UTC wall-clock), as many logs
    store them: the pull then compares the cutoff with the column as it is."""
    import duckdb

    with duckdb.connect() as connection:
        connection.execute("SET TimeZone = 'UTC'")
        connection.execute(
            "COPY (SELECT user_id, arm, CAST(exposed_at AS TIMESTAMP) AS exposed_at, "
            f"entry_source FROM read_parquet('{files}/exposures/*.parquet')) "
            f"TO '{files}/naive-exposures.parquet' (FORMAT parquet)")
    return files


def _pull(url: str, folder: Path | None, exposures: str, orders: str) -> PullResult:
    text = CONFIG.format(url=url, exposures=exposures, orders=orders)
    return run_pull(parse_config(text, base=folder), AS_OF)


def _check(result: PullResult, data: tuple[pd.DataFrame, pd.DataFrame]) -> None:
    assert_matches_reference(result.cube.rows, reference_cube(*data))
    assert result.cube.crossed_units == reference_crossed(data[0])


def test_duckdb_on_parquet_files(files: Path, data: tuple[pd.DataFrame, pd.DataFrame]
                                 ) -> None:
    result = _pull("duckdb://", files, 'files = "exposures/*.parquet"',
                   'files = "orders.parquet"')
    _check(result, data)
    rows = {(r["date"], r["arm"], r["source"]): r for r in result.cube.rows}
    # Hand-placed units (see pulldata.unit_data): the tie at the first instant went to
    # 'push'; 06:59 UTC on 11 March is 10 March in Los Angeles; the cutoff unit is out.
    assert rows[("2026-03-04", "control", "push")]["entered"] >= 1
    assert ("2026-03-10", "variant", "organic") in rows
    assert all(r["date"] <= "2026-03-10" for r in result.cube.rows)
    # A (date, source) where every unit was crossed has no row, only a crossed count.
    assert not any(r["source"] == "partner" for r in result.cube.rows)
    assert any(c.source == "partner" for c in result.cube.crossed)


def test_duckdb_naive_exposure_times(naive_files: Path,
                                     data: tuple[pd.DataFrame, pd.DataFrame]) -> None:
    import duckdb

    with duckdb.connect() as connection:
        kind = connection.execute("SELECT typeof(exposed_at) FROM "
                                  f"'{naive_files}/naive-exposures.parquet' LIMIT 1").fetchone()
    assert kind == ("TIMESTAMP",)
    _check(_pull("duckdb://", naive_files, 'files = "naive-exposures.parquet"',
                 'files = "orders.parquet"'), data)


def test_duckdb_database_table(tmp_path: Path, files: Path,
                               data: tuple[pd.DataFrame, pd.DataFrame]) -> None:
    import duckdb

    database = tmp_path / "warehouse.duckdb"
    with duckdb.connect(str(database)) as connection:
        connection.execute("CREATE SCHEMA logs")
        connection.execute("CREATE TABLE logs.exposures AS SELECT * FROM "
                           f"read_parquet('{files}/exposures/*.parquet')")
        connection.execute("CREATE TABLE orders AS SELECT * FROM "
                           f"read_parquet('{files}/orders.parquet')")
    result = _pull(f"duckdb://{database}", None, 'table = "logs.exposures"',
                   'table = "orders"')
    _check(result, data)


def test_duckdb_csv_files(tmp_path: Path, data: tuple[pd.DataFrame, pd.DataFrame]) -> None:
    exposures, orders = data
    exposures.assign(exposed_at=exposures["exposed_at"].dt.strftime(
        "%Y-%m-%dT%H:%M:%S.%fZ")).to_csv(tmp_path / "exposures.csv", index=False)
    orders.to_csv(tmp_path / "orders.csv", index=False, date_format="%Y-%m-%d %H:%M:%S.%f")
    result = _pull("duckdb://", tmp_path, 'files = "exposures.csv"', 'files = "orders.csv"')
    _check(result, data)


@pytest.fixture(scope="module")
def postgres_url(data: tuple[pd.DataFrame, pd.DataFrame]) -> Iterator[str]:
    problem = postgres_problem()
    if problem:
        pytest.skip(problem)
    import psycopg

    exposures, orders = data
    with postgres_database("inrush_pull") as url, \
            psycopg.connect(libpq(url), autocommit=True) as connection:
        connection.execute("CREATE SCHEMA logs")
        connection.execute("CREATE TABLE logs.exposures (user_id bigint, arm text, "
                           "exposed_at timestamptz, entry_source text)")
        connection.execute("CREATE TABLE orders (user_id bigint, ordered_at timestamp, "
                           "amount double precision)")
        for table, frame in (("logs.exposures", exposures), ("orders", orders)):
            buffer = io.StringIO()
            frame.to_csv(buffer, index=False, header=False, date_format="%Y-%m-%d %H:%M:%S.%f%z")
            with connection.cursor().copy(f"COPY {table} FROM STDIN (FORMAT csv)") as copy:
                copy.write(buffer.getvalue())
        connection.execute("CREATE TABLE logs.naive_exposures AS SELECT user_id, arm, "
                           "exposed_at AT TIME ZONE 'UTC' AS exposed_at, entry_source "
                           "FROM logs.exposures")
        yield url


@pytest.mark.postgres
def test_postgres_tables(postgres_url: str, data: tuple[pd.DataFrame, pd.DataFrame]) -> None:
    _check(_pull(postgres_url, None, 'table = "logs.exposures"', 'table = "orders"'), data)


def _spark_problem() -> str | None:
    try:
        import pyspark  # noqa: F401
    except ImportError:
        return "PySpark is not installed (make install-spark)"
    if shutil.which("java") is None:
        return "Java is not installed: Spark needs Java 17 or later"
    return None


@pytest.fixture(scope="module")
def spark() -> Iterator[None]:
    """One local Spark session for the module (its start-up takes seconds)."""
    problem = _spark_problem()
    if problem:
        pytest.skip(problem)
    from pyspark.sql import SparkSession

    session = (SparkSession.builder.master("local[2]").appName("inrush-tests")
               .config("spark.ui.enabled", "false")
               .config("spark.sql.shuffle.partitions", "4").getOrCreate())
    yield
    session.stop()


def test_spark_on_parquet_files(spark: None, files: Path,
                                data: tuple[pd.DataFrame, pd.DataFrame]) -> None:
    result = _pull("spark://local[2]", files, 'files = "exposures/*.parquet"',
                   'files = "orders.parquet"')
    _check(result, data)
    duck = _pull("duckdb://", files, 'files = "exposures/*.parquet"',
                 'files = "orders.parquet"')
    # Counts and sums of whole numbers are the same to the bit; float sums to rounding.
    assert [(r["date"], r["arm"], r["source"], r["entered"]) for r in result.cube.rows] == \
        [(r["date"], r["arm"], r["source"], r["entered"]) for r in duck.cube.rows]
    assert [r["metrics"]["visits_2d"] for r in result.cube.rows] == \
        [r["metrics"]["visits_2d"] for r in duck.cube.rows]


@pytest.mark.postgres
def test_postgres_naive_exposure_times(postgres_url: str,
                                       data: tuple[pd.DataFrame, pd.DataFrame]) -> None:
    _check(_pull(postgres_url, None, 'table = "logs.naive_exposures"', 'table = "orders"'),
           data)


def test_spark_naive_exposure_times(spark: None, naive_files: Path,
                                    data: tuple[pd.DataFrame, pd.DataFrame]) -> None:
    _check(_pull("spark://local[2]", naive_files, 'files = "naive-exposures.parquet"',
                 'files = "orders.parquet"'), data)


@pytest.mark.postgres
def test_postgres_names_a_missing_table(postgres_url: str) -> None:
    from detectors.errors import InputError

    with pytest.raises(InputError) as error:
        _pull(postgres_url, None, 'table = "logs.nothing_here"', 'table = "orders"')
    assert error.value.problems[0].field == "exposures.table"
    assert "nothing_here" in error.value.problems[0].message
