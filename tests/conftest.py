"""Settings and fixtures shared by every test run.

``database_url`` is parametrised over the backends named in ``INRUSH_TEST_BACKENDS`` (default
``sqlite,postgres``). The SQLite case is a file in the test's temporary directory. The
PostgreSQL case creates its own database (``inrush_test_<random>``, copied from a template
migrated once per run unless the test is marked ``empty_database``) on the server at
``INRUSH_TEST_POSTGRES_URL`` (default postgresql+psycopg://postgres@127.0.0.1:5432/test) and
drops it afterwards; it is skipped, with the reason, only when that server cannot be reached.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.backends import backend_database, backend_params

# Apps built by tests deliver no webhooks in the background; the notification tests run the
# delivery worker themselves, step by step.
os.environ.setdefault("INRUSH_NOTIFY_WORKER", "0")


@pytest.fixture(params=backend_params())
def database_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A fresh database on each backend, at the head revision (a copy of one migrated once
    per run), or empty for a test marked ``empty_database``; the SQLAlchemy URL the service
    takes."""
    migrated = request.node.get_closest_marker("empty_database") is None
    with backend_database(request.param, tmp_path, "inrush_test", migrated=migrated) as url:
        yield url
