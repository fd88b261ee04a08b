"""Faults: a server killed mid-write, a webhook receiver that misbehaves, a database that
goes away. Each test injects the fault, then checks that nothing acknowledged is lost, nothing
half-done is visible, and the service recovers without being restarted by hand.
"""

from __future__ import annotations

import random
import sqlite3
import threading
from pathlib import Path

import httpx
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from service.app import create_app
from service.db.notify_models import DeliveryAttempt, Outbox
from service.notify.settings import NotifySettings
from service.notify.worker import NotifyWorker
from service.settings import Settings
from tests.reliability.conftest import ADMIN_TOKEN
from tests.reliability.support import (
    DEMO_CSV,
    EXPERIMENT,
    FaultyReceiver,
    LiveServer,
    batch_rows,
    expected_batch,
    libpq,
    postgres_problem,
    record,
    rows_by_source,
    wait_for,
)

pytestmark = pytest.mark.slow
BATCH_DAYS = 5


# -- SIGKILL in the middle of concurrent writes ------------------------------------------------


def test_sigkill_during_concurrent_writes_loses_no_acknowledged_write(tmp_path: Path) -> None:
    """Each request writes a distinctive batch (its own source over 5 days and both arms);
    after SIGKILL and a restart every acknowledged batch is there in full, every other batch
    is there in full or not at all, the stored diagnosis covers exactly the stored rows, and
    SQLite's integrity check passes."""
    database = tmp_path / "inrush.db"
    url = f"sqlite:///{database}"
    server = LiveServer(url, tmp_path / "server.log").start()
    acknowledged: set[str] = set()
    attempted: set[str] = set()
    lock = threading.Lock()
    stop = threading.Event()
    try:
        with server.client() as client:
            assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201

        def writer(number: int) -> None:
            with httpx.Client(base_url=server.base_url, headers=server.headers,
                              timeout=30) as client:
                for k in range(10_000):
                    if stop.is_set():
                        return
                    tag = f"w{number}x{k}"
                    with lock:
                        attempted.add(tag)
                    try:
                        answer = client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                                            json={"rows": batch_rows(tag, BATCH_DAYS)})
                    except httpx.HTTPError:
                        return  # the server is gone
                    if answer.status_code == 200:
                        with lock:
                            acknowledged.add(tag)

        threads = [threading.Thread(target=writer, args=(n,)) for n in range(6)]
        for thread in threads:
            thread.start()
        wait_for(lambda: len(acknowledged) >= 12, 120, what="12 acknowledged writes")
        server.kill()  # SIGKILL while the writers are mid-request
        stop.set()
        for thread in threads:
            thread.join(60)
    finally:
        stop.set()
        server.kill()
    record("faults.sigkill", 1)
    in_flight = attempted - acknowledged
    assert in_flight, "the kill should interrupt requests in flight"

    with sqlite3.connect(database) as connection:
        assert connection.execute("PRAGMA integrity_check").fetchone()[0] == "ok"

    restarted = LiveServer(url, tmp_path / "server-restarted.log").start()
    try:
        with restarted.client() as client:
            stored = client.get(f"/v1/experiments/{EXPERIMENT['id']}/observations").json()
            by_source = rows_by_source(stored["rows"])
            missing = sorted(t for t in acknowledged if by_source.get(t) != expected_batch(t))
            assert not missing, f"acknowledged writes lost or altered: {missing}"
            for source, rows in by_source.items():
                assert source in attempted, f"rows nobody wrote: {source}"
                assert rows == expected_batch(source, BATCH_DAYS), f"partial batch {source}"
            # The diagnosis commits with its rows: the latest one counts exactly what is stored.
            diagnosis = client.get(f"/v1/experiments/{EXPERIMENT['id']}/diagnosis").json()
            total = sum(r["entered"] for r in stored["rows"])
            assert sum(diagnosis["srm"]["observed"].values()) == total
            # And the restarted server takes writes again.
            again = client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                               json={"rows": batch_rows("after-restart", BATCH_DAYS)})
            assert again.status_code == 200, again.text
    finally:
        restarted.stop()
    with sqlite3.connect(database) as connection:
        assert connection.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


# -- a webhook receiver that is down, slow or failing -----------------------------------------

FAST_RETRIES = (0.0, *([0.15] * 40))  # the real schedule waits minutes to hours


@pytest.mark.parametrize("fault", ["down", "slow", "error"])
def test_webhook_receiver_outage_ends_with_every_notification_delivered(
        database_url: str, fault: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """Until every queued notification has failed at least once the receiver is down
    (connection refused), too slow (answers after the sender's timeout) or answers 500; then
    it recovers. Every notification arrives, and each alert's deliveries list the failed
    attempts and the final delivery."""
    monkeypatch.setenv("INRUSH_WEBHOOK_ALLOW_HOSTS", "127.0.0.1:*")
    receiver = FaultyReceiver(mode={"down": "ok", "slow": "slow", "error": "error"}[fault],
                              delay=1.0)
    if fault != "down":
        receiver.start()
    app = create_app(Settings(database_url=database_url, admin_token=ADMIN_TOKEN))
    notify = NotifySettings(webhook_allow_hosts="127.0.0.1:*", notify_worker=False,
                            notify_poll_seconds=0.05, webhook_timeout_seconds=0.4)
    with TestClient(app, raise_server_exceptions=False) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN_TOKEN}"
        created = client.post("/v1/experiments", json={
            **EXPERIMENT, "notify": {"webhook_url": receiver.url,
                                     "secret": "larkspur-trails-shared-secret"}})
        assert created.status_code == 201, created.text
        written = client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                             content=DEMO_CSV.read_bytes(), headers={"Content-Type": "text/csv"})
        assert written.status_code == 200, written.text
        database = app.state.database
        with database.sessions() as session:
            queued = {row.event_id: row.incident_id
                      for row in session.scalars(select(Outbox))}
        assert queued, "the demo data opens an incident, which queues a notification"

        worker = NotifyWorker(database, notify, schedule=FAST_RETRIES, rng=random.Random(5))
        worker.start()
        try:
            def every_row_failed_once() -> bool:
                with database.sessions() as session:
                    failed = session.scalar(
                        select(func.count(func.distinct(DeliveryAttempt.outbox_id)))
                        .where(DeliveryAttempt.error.is_not(None)))
                return failed == len(queued)

            wait_for(every_row_failed_once, 60, what="a failed attempt for every notification")
            if fault == "down":
                receiver.start()
            else:
                receiver.mode = "ok"
            wait_for(lambda: receiver.delivered_ids() >= set(queued), 60,
                     what="every notification delivered")
            wait_for(lambda: _all_delivered(client, set(queued.values())), 30,
                     what="deliveries recorded as delivered")
        finally:
            worker.stop()
            receiver.stop()

        failed_attempts = 0
        for incident_id in sorted(set(queued.values())):
            listing = client.get(f"/v1/incidents/{incident_id}/deliveries")
            assert listing.status_code == 200, listing.text
            for item in listing.json()["items"]:
                assert item["status"] == "delivered" and item["delivered_at"], item
                history = item["history"]
                assert item["attempts"] == len(history) >= 2, item
                assert history[-1]["error"] is None and history[-1]["status_code"] == 200
                failures = history[:-1]
                assert failures and all(a["error"] for a in failures), history
                if fault == "error":
                    assert all(a["status_code"] == 500 for a in failures), history
                if fault == "slow":
                    assert any("timed out" in a["error"] for a in failures), history
                failed_attempts += len(failures)
        record(f"faults.webhook_{fault}.failed_attempts", failed_attempts)


def _all_delivered(client: TestClient, incident_ids: set[int]) -> bool:
    for incident_id in incident_ids:
        items = client.get(f"/v1/incidents/{incident_id}/deliveries").json()["items"]
        if not items or any(i["status"] != "delivered" for i in items):
            return False
    return True


# -- the database briefly unavailable ---------------------------------------------------------


def _assert_unavailable(answer: httpx.Response) -> None:
    assert answer.status_code == 503, answer.text
    assert answer.headers["content-type"].startswith("application/problem+json")
    assert int(answer.headers["retry-after"]) > 0
    problem = answer.json()
    assert problem["status"] == 503 and problem["type"].endswith("/problems/service-unavailable")


def test_sqlite_locked_past_busy_timeout_answers_503_then_recovers(tmp_path: Path) -> None:
    """Another process holds SQLite's write lock beyond the busy timeout: writes answer 503
    with Retry-After and write nothing; reads go on (WAL); once the lock is released the same
    server process takes writes again."""
    database = tmp_path / "inrush.db"
    server = LiveServer(f"sqlite:///{database}", tmp_path / "server.log",
                        env={"INRUSH_SQLITE_BUSY_TIMEOUT_MS": "300"}).start()
    try:
        with server.client() as client:
            assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
            blocker = sqlite3.connect(database, isolation_level=None, timeout=0)
            blocker.execute("BEGIN EXCLUSIVE")
            try:
                refused = 0
                for tag in ("locked-1", "locked-2"):
                    answer = client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                                        json={"rows": batch_rows(tag)})
                    _assert_unavailable(answer)
                    refused += 1
                answer = client.post("/v1/experiments", json={**EXPERIMENT, "id": "trail-map"})
                _assert_unavailable(answer)
                refused += 1
                assert client.get(f"/v1/experiments/{EXPERIMENT['id']}").status_code == 200
            finally:
                blocker.execute("ROLLBACK")
                blocker.close()
            record("faults.sqlite_lock.refused_503", refused)
            answer = client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                                json={"rows": batch_rows("after-lock")})
            assert answer.status_code == 200, answer.text
            stored = rows_by_source(client.get(
                f"/v1/experiments/{EXPERIMENT['id']}/observations").json()["rows"])
            assert set(stored) == {"after-lock"}
            assert client.get("/v1/experiments/trail-map").status_code == 404
            assert server.process is not None and server.process.poll() is None
    finally:
        server.stop()
    assert "Traceback" not in server.log_text()


@pytest.mark.postgres
def test_postgres_refusing_connections_answers_503_then_recovers(tmp_path: Path) -> None:
    """The service's database stops accepting connections and its sessions are terminated:
    every request answers 503 with Retry-After (health too), the process stays up, and when
    the database accepts connections again the service answers normally by itself."""
    problem = postgres_problem()
    if problem:
        pytest.skip(problem)
    import psycopg

    from tests.reliability.support import postgres_database

    with postgres_database("inrush_outage") as url:
        name = url.rsplit("/", 1)[1]
        admin = libpq(url.rsplit("/", 1)[0] + "/postgres")
        server = LiveServer(url, tmp_path / "server.log").start()
        try:
            with server.client(timeout=30) as client:
                assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
                assert client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                                  json={"rows": batch_rows("before")}).status_code == 200
                with psycopg.connect(admin, autocommit=True) as connection:
                    connection.execute(f'ALTER DATABASE "{name}" ALLOW_CONNECTIONS false')
                    connection.execute("SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                                       "WHERE datname = %s AND pid <> pg_backend_pid()", (name,))
                refused = 0
                try:
                    for _ in range(2):
                        _assert_unavailable(client.get(f"/v1/experiments/{EXPERIMENT['id']}"))
                        _assert_unavailable(client.put(
                            f"/v1/experiments/{EXPERIMENT['id']}/observations",
                            json={"rows": batch_rows("during")}))
                        _assert_unavailable(client.get("/healthz"))
                        refused += 3
                    assert server.process is not None and server.process.poll() is None
                finally:
                    with psycopg.connect(admin, autocommit=True) as connection:
                        connection.execute(f'ALTER DATABASE "{name}" ALLOW_CONNECTIONS true')
                record("faults.postgres_outage.refused_503", refused)
                wait_for(lambda: client.get("/healthz").status_code == 200, 30,
                         what="health after the outage")
                answer = client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                                    json={"rows": batch_rows("after")})
                assert answer.status_code == 200, answer.text
                stored = rows_by_source(client.get(
                    f"/v1/experiments/{EXPERIMENT['id']}/observations").json()["rows"])
                assert set(stored) == {"before", "after"}
        finally:
            server.stop()



def test_only_unavailability_errors_become_503() -> None:
    """What the 503 handler takes for "the database is unavailable, retry": lost or refused
    connections, lock timeouts, an exhausted pool; constraint and data errors stay 500s
    (they are bugs, and retrying would not help)."""
    from sqlalchemy import exc

    from service.problems import database_unavailable

    orig = Exception("server closed the connection unexpectedly")
    assert database_unavailable(exc.OperationalError("SELECT 1", {}, orig))
    assert database_unavailable(exc.InterfaceError("SELECT 1", {}, orig))
    assert database_unavailable(exc.TimeoutError("QueuePool limit of size 5 overflow 10"))
    assert database_unavailable(exc.DisconnectionError("gone"))
    assert database_unavailable(exc.DBAPIError("SELECT 1", {}, orig,
                                               connection_invalidated=True))
    assert not database_unavailable(exc.IntegrityError("INSERT", {}, orig))
    assert not database_unavailable(exc.DataError("INSERT", {}, orig))
    assert not database_unavailable(ValueError("not a database error"))
