"""Which database backends the tests run on, and a throw-away PostgreSQL database per test.

Shared by ``tests/conftest.py`` (the ``database_url`` fixture) and the reliability tests.
"""

from __future__ import annotations

import contextlib
import functools
import os
import secrets
from collections.abc import Iterator

from sqlalchemy.engine import make_url

POSTGRES_URL = os.environ.get("INRUSH_TEST_POSTGRES_URL",
                              "postgresql+psycopg://postgres@127.0.0.1:5432/test")


def wanted_backends() -> list[str]:
    return [b.strip() for b in os.environ.get("INRUSH_TEST_BACKENDS", "sqlite,postgres")
            .split(",") if b.strip()]


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
