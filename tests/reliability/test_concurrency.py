"""Concurrent writers against a live ``inrush serve --workers 2``, on SQLite and PostgreSQL.

Eight client threads upload at once, in JSON and CSV, rows of their own and rows every thread
writes, many times over, while ``inrush reanalyze`` runs beside the server and both worker
processes deliver webhooks to a receiver on 127.0.0.1. Afterwards the database must hold
exactly the rows sent (no row lost, none duplicated, shared rows all from one request), every
alert once per (experiment, kind, key), snapshot versions 1..n with the latest computed on the
final rows, and each notification delivered exactly once.
"""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
import threading
import time
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pandas as pd
import pytest
from inrush_process import inrush_serve
from notify_receiver import Receiver, running_receiver
from sqlalchemy import func, select

from service.db.incident_models import IncidentEvent
from service.db.models import Alert, DiagnosisSnapshot, Observation
from service.db.notify_models import DELIVERED, Outbox
from service.db.session import Database
from service.demo import scenario

pytestmark = [pytest.mark.slow, pytest.mark.timeout(120)]

THREADS = 8
ROUNDS = 2
SHARED_DAYS = 4  # the first days of the demo: every thread writes them
EXPERIMENT_ID = scenario.EXPERIMENT_ID
TOKEN = "concurrency-admin-token-larkspur"


@pytest.fixture
def server(database_url: str, tmp_path: Path) -> Iterator[str]:
    """The base URL of ``inrush serve --workers 2`` on a fresh database of the backend."""
    with inrush_serve(tmp_path, workers=2, database_url=database_url, token=TOKEN,
                      arguments=("--log-level", "warning"), clean_log=True, env={
                          "INRUSH_NOTIFY_WORKER": "1", "INRUSH_NOTIFY_POLL_SECONDS": "0.2",
                          "INRUSH_WEBHOOK_ALLOW_HOSTS": "127.0.0.1:*"}) as (base, _):
        yield base


def _webhook_ids(receiver: Receiver) -> list[str]:
    with receiver.lock:
        return [request.headers.get("webhook-id", "") for request in receiver.requests]


def _json_body(frame: pd.DataFrame) -> bytes:
    rows = [{"date": r.date, "arm": r.arm, "source": r.source, "entered": float(r.entered),
             "metrics": {"routes_saved": {"n": float(r.n), "sum": float(r.sum),
                                          "sum_sq": float(r.sum_sq)}}}
            for r in frame.rename(columns={"routes_saved.n": "n", "routes_saved.sum": "sum",
                                           "routes_saved.sum_sq": "sum_sq"})
            .itertuples(index=False)]
    return json.dumps({"rows": rows}).encode()


def _csv_body(frame: pd.DataFrame) -> bytes:
    buffer = io.StringIO()
    frame.to_csv(buffer, index=False)
    return buffer.getvalue().encode()


def test_concurrent_writers_lose_nothing_and_duplicate_nothing(
        server: str, database_url: str, tmp_path: Path) -> None:
    demo = pd.read_csv(scenario.CSV_PATH)
    days = sorted(demo["date"].unique())
    shared = demo[demo["date"].isin(days[:SHARED_DAYS])]
    # Thread t alone writes every THREADS-th day after the shared ones.
    own = [demo[demo["date"].isin(days[SHARED_DAYS + t::THREADS])] for t in range(THREADS)]

    def shared_batch(marker: int) -> pd.DataFrame:
        """The shared rows with ``marker`` extra units each: which request wrote a row shows."""
        return shared.assign(entered=shared["entered"] + marker)

    headers = {"Authorization": f"Bearer {TOKEN}"}
    answers: list[tuple[int, int, httpx.Response]] = []  # (thread, sequence, answer)
    answers_lock = threading.Lock()
    start = threading.Barrier(THREADS)

    def writer(thread: int) -> None:
        is_csv = thread % 2 == 0
        encode = _csv_body if is_csv else _json_body
        kind = {"Content-Type": "text/csv" if is_csv else "application/json"}
        with httpx.Client(base_url=server, headers={**headers, **kind}, timeout=60) as client:
            start.wait()
            for sequence in range(ROUNDS * 2):
                batch = own[thread] if sequence % 2 == 0 else shared_batch(thread)
                answer = client.put(f"/v1/experiments/{EXPERIMENT_ID}/observations",
                                    content=encode(batch))
                with answers_lock:
                    answers.append((thread, sequence, answer))

    with running_receiver() as receiver:
        created = httpx.post(f"{server}/v1/experiments", headers=headers, timeout=30, json={
            "id": EXPERIMENT_ID, "title": scenario.TITLE, "start_date": scenario.START.isoformat(),
            "arms": list(scenario.ARMS),
            "allocation": [{"from": scenario.START.isoformat(), "weights": [0.5, 0.5]}],
            "notify": {"webhook_url": f"{receiver.url}/larkspur/hook",
                       "secret": "larkspur-trails-hook"}})
        assert created.status_code == 201, created.text

        threads = [threading.Thread(target=writer, args=(t,)) for t in range(THREADS)]
        for thread in threads:
            thread.start()
        # A re-analysis beside the running service takes the same per-experiment lock.
        time.sleep(1.0)
        reanalysis = subprocess.run(
            [sys.executable, "-m", "service.cli", "reanalyze", "--all", "--no-progress"],
            env={**{k: v for k, v in os.environ.items() if k != "PROMETHEUS_MULTIPROC_DIR"},
                 "INRUSH_DATABASE_URL": database_url},
            capture_output=True, text=True, timeout=90)
        for thread in threads:
            thread.join(90)
        assert reanalysis.returncode == 0, reanalysis.stdout + reanalysis.stderr

        bad = [(t, s, a.status_code, a.text[:300]) for t, s, a in answers if a.status_code != 200]
        assert not bad, bad
        assert len(answers) == THREADS * ROUNDS * 2

        database = Database(database_url)
        try:
            delivered = _wait_for_deliveries(database, receiver)
            _check_rows(database, demo, shared, shared_batch, answers)
            _check_snapshots(database, answers)
            _check_alerts_and_notifications(database, receiver, delivered)
        finally:
            database.dispose()


def _wait_for_deliveries(database: Database, receiver: Receiver) -> list[str]:
    """The event ids of the outbox once every row is delivered (then a little longer, so that
    a second delivery by the other worker would be seen)."""
    deadline = time.monotonic() + 30
    while True:
        with database.sessions() as session:
            rows = session.execute(select(Outbox.event_id, Outbox.status)).all()
            # One row per incident transition that notifies (none while the detectors find
            # no episode in the data).
            expected = session.scalar(select(func.count()).select_from(IncidentEvent).where(
                IncidentEvent.action.in_(("opened", "reopened", "updated", "resolved"))))
        if len(rows) == expected and all(status == DELIVERED for _, status in rows):
            break
        assert time.monotonic() < deadline, Counter(status for _, status in rows)
        time.sleep(0.2)
    time.sleep(1.0)  # several poll intervals of both workers
    return [event_id for event_id, _ in rows]


def _check_rows(database: Database, demo: pd.DataFrame, shared: pd.DataFrame,
                shared_batch: Any, answers: list[tuple[int, int, httpx.Response]]) -> None:
    key = ["date", "arm", "source"]
    with database.sessions() as session:
        stored = pd.DataFrame(
            [(o.date.isoformat(), o.arm, o.source, o.entered, o.metrics["routes_saved"]["sum"])
             for o in session.scalars(select(Observation).where(
                 Observation.experiment_id == EXPERIMENT_ID))],
            columns=[*key, "entered", "routes_saved.sum"])
    assert len(stored) == len(demo)  # every key once: nothing lost, nothing duplicated
    assert not stored.duplicated(key).any()
    merged = stored.merge(demo, on=key, suffixes=("", "_sent"), validate="one_to_one")
    is_shared = merged["date"].isin(set(shared["date"]))
    own = merged[~is_shared]
    assert (own["entered"] == own["entered_sent"]).all()
    assert own["routes_saved.sum"].sum() == pytest.approx(own["routes_saved.sum_sent"].sum())
    # The shared rows are all from one request: one marker on every one of them.
    markers = set((merged.loc[is_shared, "entered"]
                   - merged.loc[is_shared, "entered_sent"]).tolist())
    assert len(markers) == 1 and markers <= set(range(THREADS)), markers
    assert int(stored["entered"].sum()) == int(demo["entered"].sum()) + \
        markers.pop() * len(shared)
    # Each key was inserted by exactly one request; every other write of it replaced it.
    inserted = sum(a.json()["inserted"] for _, _, a in answers)
    updated = sum(a.json()["updated"] for _, _, a in answers)
    assert inserted == len(demo)
    assert inserted + updated == sum(a.json()["written"] for _, _, a in answers)


def _check_snapshots(database: Database, answers: list[tuple[int, int, httpx.Response]]
                     ) -> None:
    with database.sessions() as session:
        snapshots = session.execute(select(DiagnosisSnapshot.version,
                                           DiagnosisSnapshot.created_at,
                                           DiagnosisSnapshot.document)
                                    .where(DiagnosisSnapshot.experiment_id == EXPERIMENT_ID)
                                    .order_by(DiagnosisSnapshot.id)).all()
        total = int(session.scalar(select(func.sum(Observation.entered)).where(
            Observation.experiment_id == EXPERIMENT_ID)) or 0)
    versions = [v for v, _, _ in snapshots]
    assert versions == list(range(1, len(versions) + 1))  # unique, increasing, no gap
    times = [t for _, t, _ in snapshots]
    assert times == sorted(times)
    # The latest diagnosis was computed on the final rows, not on a stale read.
    assert sum(snapshots[-1][2]["srm"]["observed"].values()) == total
    # Each thread saw versions that never go back: the writes were serialised.
    for thread in range(THREADS):
        seen = [a.json()["diagnosis"]["version"]
                for t, _, a in sorted(answers, key=lambda x: x[1]) if t == thread]
        assert seen == sorted(seen) and set(seen) <= set(versions), (thread, seen)


def _check_alerts_and_notifications(database: Database, receiver: Receiver,
                                    delivered: list[str]) -> None:
    with database.sessions() as session:
        identities = session.execute(select(Alert.kind, Alert.key, func.count())
                                     .where(Alert.experiment_id == EXPERIMENT_ID)
                                     .group_by(Alert.kind, Alert.key)).all()
        # Every incident transition that notifies was queued exactly once.
        transitions = dict(session.execute(
            select(IncidentEvent.incident_id, func.count())
            .where(IncidentEvent.action.in_(("opened", "reopened", "updated", "resolved")))
            .group_by(IncidentEvent.incident_id)).all())
        queued = dict(session.execute(select(Outbox.incident_id, func.count())
                                      .group_by(Outbox.incident_id)).all())
    assert identities, "the demo data raises alerts"
    assert all(count == 1 for *_, count in identities), identities
    assert queued == transitions
    # Two worker processes poll the same outbox: each event reached the receiver once.
    received = Counter(_webhook_ids(receiver))
    assert set(received) == set(delivered)
    assert all(count == 1 for count in received.values()), received.most_common(3)
