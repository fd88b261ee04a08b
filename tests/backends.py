"""Which database backends the tests run on, and a fresh database on each of them.

Shared by ``tests/conftest.py`` (the ``database_url`` fixture) and the reliability tests
(``backend_url``).
"""

from __future__ import annotations

import contextlib
import functools
import os
import secrets
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
def backend_database(backend: str, folder: Path, prefix: str) -> Iterator[str]:
    """The SQLAlchemy URL of a fresh, empty database: a SQLite file in ``folder``, or a
    PostgreSQL database named ``prefix_<hex>`` and dropped afterwards. The test is skipped,
    with the reason, when the PostgreSQL server cannot be reached."""
    if backend == "sqlite":
        yield f"sqlite:///{folder / 'inrush.db'}"
        return
    problem = postgres_problem()
    if problem:
        pytest.skip(problem)
    with postgres_database(prefix) as url:
        yield url


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
def postgres_database(prefix: str = "inrush_rel") -> Iterator[str]:
    """A fresh PostgreSQL database (dropped afterwards); its SQLAlchemy URL."""
    import psycopg

    name = f"{prefix}_{secrets.token_hex(6)}"
    admin = libpq(POSTGRES_URL)
    with psycopg.connect(admin, autocommit=True) as connection:
        connection.execute(f'CREATE DATABASE "{name}"')
    try:
        yield make_url(POSTGRES_URL).set(database=name).render_as_string(hide_password=False)
    finally:
        with psycopg.connect(admin, autocommit=True) as connection:
            connection.execute(f'ALTER DATABASE "{name}" ALLOW_CONNECTIONS true')
            connection.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
