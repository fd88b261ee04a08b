"""Which database backends the tests run on, and a fresh database on each of them.

Shared by ``tests/conftest.py`` (the ``database_url`` fixture) and the reliability tests
(``backend_url``).
"""

from __future__ import annotations

import atexit
import contextlib
import functools
import os
import secrets
import shutil
import sqlite3
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy.engine import make_url

POSTGRES_URL = os.environ.get("INRUSH_TEST_POSTGRES_URL",
                              "postgresql+psycopg://postgres@127.0.0.1:5432/test")


def wanted_backends() -> list[str]:
    return [b.strip() for b in os.environ.get("INRUSH_TEST_BACKENDS", "sqlite,postgres")
            .split(",") if b.strip()]


def backend_params() -> list[Any]:
    """One pytest parameter per wanted backend; PostgreSQL's carry the ``postgres`` mark."""
    return [pytest.param(name, marks=[pytest.mark.postgres] if name == "postgres" else [],
                         id=name) for name in wanted_backends()]


@contextlib.contextmanager
def backend_database(backend: str, folder: Path, prefix: str, *,
                     migrated: bool = False) -> Iterator[str]:
    """The SQLAlchemy URL of a fresh database: a SQLite file in ``folder``, or a PostgreSQL
    database named ``prefix_<hex>`` and dropped afterwards. Empty, or with ``migrated`` a copy
    of one migrated to the head revision once per test run (the same schema the service's
    start-up migration would make, at a fraction of its cost per test). The test is skipped,
    with the reason, when the PostgreSQL server cannot be reached."""
    if backend == "sqlite":
        path = folder / "inrush.db"
        if migrated:
            shutil.copyfile(_migrated_sqlite_file(), path)
        yield f"sqlite:///{path}"
        return
    problem = postgres_problem()
    if problem:
        pytest.skip(problem)
    with postgres_database(prefix, template=_migrated_postgres_template() if migrated
                           else None) as url:
        yield url


def _migrate(url: str) -> None:
    from service.db.session import Database

    database = Database(url)
    try:
        database.migrate()
    finally:
        database.dispose()


@functools.cache
def _migrated_sqlite_file() -> Path:
    """A SQLite file at the head revision, made once per process and removed at exit."""
    folder = Path(tempfile.mkdtemp(prefix="inrush-template-"))
    atexit.register(shutil.rmtree, folder, ignore_errors=True)
    path = folder / "template.db"
    _migrate(f"sqlite:///{path}")
    # One file to copy: fold the write-ahead log into the database file.
    with sqlite3.connect(path) as connection:
        connection.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        connection.execute("PRAGMA journal_mode=DELETE")
    return path


@functools.cache
def _migrated_postgres_template() -> str:
    """A PostgreSQL database at the head revision that test databases are copied from
    (``CREATE DATABASE ... TEMPLATE``); made once per process and dropped at exit."""
    name = _create_postgres_database("inrush_template")
    atexit.register(_drop_postgres_database, name)
    _migrate(make_url(POSTGRES_URL).set(database=name).render_as_string(hide_password=False))
    return name


def _create_postgres_database(prefix: str, template: str | None = None) -> str:
    """Create ``prefix_<hex>``, empty or a copy of ``template``; its name."""
    import psycopg

    name = f"{prefix}_{secrets.token_hex(6)}"
    copy = f' TEMPLATE "{template}"' if template else ""
    with psycopg.connect(libpq(POSTGRES_URL), autocommit=True) as connection:
        connection.execute(f'CREATE DATABASE "{name}"{copy}')
    return name


def _drop_postgres_database(name: str) -> None:
    import psycopg

    with psycopg.connect(libpq(POSTGRES_URL), autocommit=True) as connection:
        connection.execute(f'ALTER DATABASE "{name}" ALLOW_CONNECTIONS true')
        connection.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def libpq(url: str) -> str:
    return make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)


@functools.cache
def postgres_problem() -> str | None:
    """Why PostgreSQL cannot be used, or ``None`` when it can."""
    shown = make_url(POSTGRES_URL).render_as_string(hide_password=True)
    try:
        import psycopg
    except ImportError:
        return (f"PostgreSQL not reachable at {shown}: psycopg is not installed "
                "(pip install -e '.[postgres]')")
    try:
        with psycopg.connect(libpq(POSTGRES_URL), connect_timeout=3) as connection:
            connection.execute("SELECT 1")
    except psycopg.Error as error:
        return f"PostgreSQL not reachable at {shown}: {str(error).strip()}"
    return None


@contextlib.contextmanager
def postgres_database(prefix: str = "inrush_rel", template: str | None = None
                      ) -> Iterator[str]:
    """A fresh PostgreSQL database (dropped afterwards), empty or a copy of ``template``; its
    SQLAlchemy URL."""
    name = _create_postgres_database(prefix, template)
    try:
        yield make_url(POSTGRES_URL).set(database=name).render_as_string(hide_password=False)
    finally:
        _drop_postgres_database(name)
