"""Which database errors answer 503 with Retry-After (retrying may succeed) and which do not
(the same request would fail again), from errors raised by the real drivers."""

from __future__ import annotations

import sqlite3
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text
from sqlalchemy.exc import DBAPIError

from service.problems import database_unavailable
from tests.backends import POSTGRES_URL, postgres_problem


def _error(engine_url: str, statement: str, **connect_args: object) -> DBAPIError:
    engine = create_engine(engine_url, connect_args=connect_args)
    try:
        with engine.connect() as connection:
            connection.execute(text(statement))
    except DBAPIError as error:
        return error
    finally:
        engine.dispose()
    raise AssertionError("the statement did not fail")


def test_sqlite_limits_and_mistakes_are_not_transient(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'x.db'}"
    too_wide = "SELECT " + ", ".join(["1"] * 2100)  # past SQLite's 2,000 result columns
    assert not database_unavailable(_error(url, too_wide))
    assert not database_unavailable(_error(url, "SELECT * FROM no_such_table"))


def test_sqlite_lock_past_the_busy_timeout_is_transient(tmp_path: Path) -> None:
    path = tmp_path / "locked.db"
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("CREATE TABLE t (x)")
    holder.execute("BEGIN IMMEDIATE")
    try:
        error = _error(f"sqlite:///{path}", "INSERT INTO t VALUES (1)", timeout=0)
    finally:
        holder.close()
    assert "locked" in str(error.orig)
    assert database_unavailable(error)


def test_an_unreachable_postgresql_server_is_transient() -> None:
    pytest.importorskip("psycopg")
    # Port 9 (discard) on loopback: nothing listens there.
    error = _error("postgresql+psycopg://postgres@127.0.0.1:9/x", "SELECT 1",
                   connect_timeout=2)
    assert database_unavailable(error)


@pytest.mark.postgres
def test_postgresql_limits_are_not_transient() -> None:
    problem = postgres_problem()
    if problem:
        pytest.skip(problem)
    too_many = "SELECT concat_ws(',', " + ", ".join(["'a'"] * 101) + ")"
    error = _error(POSTGRES_URL, too_many)
    assert error.orig.sqlstate == "54023"  # type: ignore[union-attr]
    assert not database_unavailable(error)
    assert database_unavailable(_error(POSTGRES_URL, "SET statement_timeout = 50; "
                                                     "SELECT pg_sleep(1)"))
