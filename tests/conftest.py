"""Settings and fixtures shared by every test run.

``database_url`` is parametrised over the backends named in ``INRUSH_TEST_BACKENDS`` (default
``sqlite,postgres``). The SQLite case is a file in the test's temporary directory. The
PostgreSQL case creates its own database (``inrush_test_<random>``) on the server at
``INRUSH_TEST_POSTGRES_URL`` (default postgresql+psycopg://postgres@127.0.0.1:5432/test) and
drops it afterwards; it is skipped, with the reason, only when that server cannot be reached.
"""

from __future__ import annotations

import functools
import os
import secrets
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy.engine import make_url

# Apps built by tests deliver no webhooks in the background; the notification tests run the
# delivery worker themselves, step by step.
os.environ.setdefault("INRUSH_NOTIFY_WORKER", "0")

POSTGRES_URL = os.environ.get("INRUSH_TEST_POSTGRES_URL",
                              "postgresql+psycopg://postgres@127.0.0.1:5432/test")


def _backends() -> list[Any]:
    wanted = os.environ.get("INRUSH_TEST_BACKENDS", "sqlite,postgres").split(",")
    params = []
    for name in (w.strip() for w in wanted if w.strip()):
        marks = [pytest.mark.postgres] if name == "postgres" else []
        params.append(pytest.param(name, marks=marks, id=name))
    return params


@functools.cache
def _postgres_problem() -> str | None:
    """Why PostgreSQL cannot be used, or ``None`` when it can."""
    shown = make_url(POSTGRES_URL).render_as_string(hide_password=True)
    try:
        import psycopg
    except ImportError:
        return (f"PostgreSQL not reachable at {shown}: psycopg is not installed "
                "(pip install -e '.[postgres]')")
    try:
        with psycopg.connect(_libpq(POSTGRES_URL), connect_timeout=3) as connection:
            connection.execute("SELECT 1")
    except psycopg.Error as error:
        return f"PostgreSQL not reachable at {shown}: {str(error).strip()}"
    return None


def _libpq(url: str) -> str:
    return make_url(url).set(drivername="postgresql").render_as_string(hide_password=False)


@pytest.fixture(params=_backends())
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A fresh, empty database on each backend; the SQLAlchemy URL the service takes."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'inrush.db'}"
        return
    problem = _postgres_problem()
    if problem:
        pytest.skip(problem)
    import psycopg

    name = f"inrush_test_{secrets.token_hex(6)}"
    admin = _libpq(POSTGRES_URL)
    with psycopg.connect(admin, autocommit=True) as connection:
        connection.execute(f'CREATE DATABASE "{name}"')
    try:
        yield make_url(POSTGRES_URL).set(database=name).render_as_string(hide_password=False)
    finally:
        with psycopg.connect(admin, autocommit=True) as connection:
            connection.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
