"""Time limits: a database that accepts connections and never answers makes requests and
health checks fail fast with 503 instead of hanging; long statements are cancelled on both
backends and answered 503 with Retry-After (retrying may succeed)."""

from __future__ import annotations

import contextlib
import socket
import threading
from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import text
from sqlalchemy.exc import OperationalError

from service.app import create_app
from service.db.session import Database
from service.problems import database_unavailable
from service.routers.health import PROBE_THREADS
from service.settings import Settings
from tests.reliability.support import EXPERIMENT

TOKEN = "time-limits-admin-token-larkspur"


@contextlib.contextmanager
def silent_server() -> Iterator[int]:
    """A TCP server on loopback that accepts every connection and never sends a byte."""
    listener = socket.create_server(("127.0.0.1", 0))
    listener.settimeout(0.1)
    accepted: list[socket.socket] = []
    stop = threading.Event()

    def serve() -> None:
        while not stop.is_set():
            with contextlib.suppress(TimeoutError):
                accepted.append(listener.accept()[0])

    thread = threading.Thread(target=serve, daemon=True)
    thread.start()
    try:
        yield int(listener.getsockname()[1])
    finally:
        stop.set()
        thread.join(5)
        for connection in accepted:
            connection.close()
        listener.close()


@pytest.mark.timeout(120)
def test_a_silent_postgresql_server_answers_503_fast() -> None:
    pytest.importorskip("psycopg")
    with silent_server() as port:
        settings = Settings(database_url=f"postgresql+psycopg://inrush@127.0.0.1:{port}/inrush",
                            admin_token=TOKEN, migrate_on_start=False,
                            database_connect_timeout_seconds=2, health_timeout_seconds=1)
        with TestClient(create_app(settings), raise_server_exceptions=False) as client:
            client.headers["Authorization"] = f"Bearer {TOKEN}"
            # Readiness gives up after its own 1 s, before the 2 s connect timeout; once the
            # earlier checks hold every probe thread, the next answers at once.
            for _ in range(PROBE_THREADS + 1):
                health = client.get("/healthz")
                assert health.status_code == 503
                assert health.json()["database"] == "unreachable"
                assert health.headers["retry-after"]
            # Requests give up at the connect timeout: 503, nothing hangs (without it psycopg
            # waits 130 s).
            answers = [client.post("/v1/experiments", json=EXPERIMENT),
                       client.put("/v1/experiments/route-cards/observations",
                                  content=b"date,arm,entered\n2026-10-26,control,5\n",
                                  headers={"Content-Type": "text/csv"}),
                       client.get("/v1/experiments/route-cards/diagnosis",
                                  headers={"If-None-Match": '"x"'})]
            for answer in answers:
                assert answer.status_code == 503, answer.text
                assert answer.headers["retry-after"]


@pytest.mark.timeout(120)
def test_readiness_answers_while_the_database_answers(database_url: str) -> None:
    settings = Settings(database_url=database_url, admin_token=TOKEN)
    with TestClient(create_app(settings)) as client:
        assert client.get("/healthz").json() == {"status": "ok", "database": "ok"}


# SQLite: a recursive count to fifty million runs for seconds (common practice, no source).
_SLOW = {"sqlite": "WITH RECURSIVE c(x) AS (SELECT 1 UNION ALL SELECT x + 1 FROM c "
                   "WHERE x < 50000000) SELECT count(*) FROM c",
         "postgresql": "SELECT pg_sleep(5)"}


@pytest.mark.timeout(120)
def test_long_statements_are_cancelled_and_count_as_transient(database_url: str) -> None:
    database = Database(database_url, statement_timeout_ms=200)
    try:
        with pytest.raises(OperationalError) as caught, database.engine.connect() as connection:
            connection.execute(text(_SLOW[database.dialect]))
        assert database_unavailable(caught.value)
        # The connection is usable again, and short statements are not limited.
        with database.engine.connect() as connection:
            assert connection.execute(text("SELECT 1")).scalar() == 1
        # Migrations run without the limit (and the schema comes out whole).
        database.migrate()
        assert database.current_revision() is not None
    finally:
        database.dispose()
