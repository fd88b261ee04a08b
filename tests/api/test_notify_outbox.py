"""Transactional outbox and delivery worker on SQLite and PostgreSQL, with a real receiver."""

from __future__ import annotations

import datetime as dt
import json
import random
import threading
from collections.abc import Iterator
from typing import Any

import pandas as pd
import pytest
from notify_receiver import running_receiver
from sqlalchemy import func, select

from service.analysis import refresh_diagnosis
from service.db.incident_models import Incident, IncidentEvent
from service.db.models import Experiment, Observation, utcnow
from service.db.notify_models import DELIVERED, FAILED, PENDING, DeliveryAttempt, Outbox
from service.db.session import Database
from service.demo import scenario
from service.incidents import IncidentChanges
from service.notify import signing
from service.notify.outbox import enqueue_for_changes
from service.notify.settings import NotifySettings
from service.notify.worker import LOST_LEASE, NotifyWorker

SECRET = "whsec_" + "bGFya3NwdXItdHJhaWxzLWtleQ=="
FAST = (0.0, 0.01, 0.01)  # a short retry schedule so the tests do not wait hours



@pytest.fixture
def database(database_url: str) -> Iterator[Database]:
    db = Database(database_url)
    db.migrate()
    yield db
    db.dispose()


def settings(**overrides: Any) -> NotifySettings:
    values: dict[str, Any] = {"webhook_allow_hosts": "127.0.0.1:*", "notify_worker": False,
                              "webhook_timeout_seconds": 5.0,
                              "public_url": "https://inrush.larkspur.example"}
    return NotifySettings(**(values | overrides))


def worker(database: Database, **kwargs: Any) -> NotifyWorker:
    kwargs.setdefault("schedule", FAST)
    return NotifyWorker(database, kwargs.pop("settings", settings()), rng=random.Random(3),
                        **kwargs)


def seed(database: Database, webhook_url: str | None, secret: str | None = SECRET,
         *, commit: bool = True) -> tuple[IncidentChanges, list[Outbox]]:
    """The demo experiment with its data, diagnosed, incidents synced and notifications
    queued."""
    frame = pd.read_csv(scenario.CSV_PATH)
    with database.sessions() as session:
        experiment = Experiment(id=scenario.EXPERIMENT_ID, title=scenario.TITLE,
                                start_date=scenario.START, arms=list(scenario.ARMS),
                                allocation=[{"from": scenario.START.isoformat(),
                                             "weights": [0.5, 0.5]}],
                                webhook_url=webhook_url, webhook_secret=secret)
        session.add(experiment)
        for record in frame.to_dict("records"):
            session.add(Observation(
                experiment_id=experiment.id, date=dt.date.fromisoformat(record["date"]),
                arm=record["arm"], source=record["source"], entered=int(record["entered"]),
                metrics={"routes_saved": {"n": int(record["routes_saved.n"]),
                                          "sum": float(record["routes_saved.sum"]),
                                          "sum_sq": float(record["routes_saved.sum_sq"])}}))
        session.flush()
        refresh = refresh_diagnosis(session, experiment)  # queues in the same transaction
        queued = list(session.scalars(select(Outbox).order_by(Outbox.id)))
        # Queuing again for the same changes adds nothing: event ids are unique.
        assert enqueue_for_changes(session, experiment, refresh.incidents) == []
        if commit:
            session.commit()
        else:
            session.rollback()
    return refresh.incidents, queued


def rows(database: Database) -> list[Outbox]:
    with database.sessions() as session:
        return list(session.scalars(select(Outbox).order_by(Outbox.id)))


def attempts(database: Database, outbox_id: int) -> list[DeliveryAttempt]:
    with database.sessions() as session:
        return list(session.scalars(select(DeliveryAttempt).where(
            DeliveryAttempt.outbox_id == outbox_id).order_by(DeliveryAttempt.id)))


def test_enqueue_shares_the_incident_transaction(database: Database,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("INRUSH_PUBLIC_URL", "https://inrush.larkspur.example/")
    seed(database, "https://hooks.larkspur.example/inrush", commit=False)
    with database.sessions() as session:
        assert session.scalar(select(func.count()).select_from(Incident)) == 0
        assert session.scalar(select(func.count()).select_from(Outbox)) == 0
    changes, queued = seed(database, "https://hooks.larkspur.example/inrush")
    # One campaign, one episode, one message (not one per finding behind it).
    assert len(queued) == len(changes.opened) == 1
    stored = rows(database)
    assert {r.event_type for r in stored} == {"incident.opened"}
    assert all(r.status == PENDING and r.attempts == 0 for r in stored)
    incident = stored[0].payload["data"]["incident"]
    campaign = [(scenario.START + dt.timedelta(days=d)).isoformat()
                for d in scenario.CAMPAIGN_DAYS]
    assert (incident["shape"], incident["arm"], incident["days"]) == ("inflow", "cards",
                                                                     campaign)
    kinds = {e["kind"] for e in stored[0].payload["data"]["detail"]["evidence"]}
    # The demo's whole-period ratio stays above the alert level; the campaign days do not.
    assert {"skewed_window", "skewed_source"} <= kinds
    assert stored[0].payload["data"]["links"]["status_page"] == (
        "https://inrush.larkspur.example/experiments/route-cards")


def test_no_webhook_no_notification_and_no_repeat_without_change(database: Database) -> None:
    changes, queued = seed(database, None)
    assert changes.opened and queued == [] and rows(database) == []
    with database.sessions() as session:
        experiment = session.get(Experiment, scenario.EXPERIMENT_ID)
        assert experiment is not None
        experiment.webhook_url = "https://hooks.larkspur.example/inrush"
        again = refresh_diagnosis(session, experiment)
        assert not again.incidents
        session.commit()
    assert rows(database) == []


def test_resolution_is_notified_with_its_own_event_id(database: Database) -> None:
    _, queued = seed(database, "https://hooks.larkspur.example/inrush")
    opened_ids = {r.event_id for r in queued}
    with database.sessions() as session:
        experiment = session.get(Experiment, scenario.EXPERIMENT_ID)
        assert experiment is not None
        # Corrected export: the campaign's extra units in cards were mis-attributed.
        campaign = [scenario.START + dt.timedelta(days=d) for d in scenario.CAMPAIGN_DAYS]
        for row in session.scalars(select(Observation).where(
                Observation.arm == "cards", Observation.source == "newsletter",
                Observation.date.in_(campaign))):
            row.entered -= 900
            row.metrics = {}
        session.flush()
        refresh_diagnosis(session, experiment)
        session.commit()
    resolved = [r for r in rows(database) if r.event_id not in opened_ids]
    assert len(resolved) == 1 and resolved[0].event_type == "incident.resolved"
    assert not opened_ids & {r.event_id for r in resolved}
    assert resolved[0].payload["data"]["incident"]["status"] == "resolved"


def test_worker_delivers_signed_messages_once(database: Database) -> None:
    with running_receiver() as receiver:
        _, queued = seed(database, f"{receiver.url}/hooks/inrush")
        assert worker(database).run_once() == len(queued)
        assert worker(database).run_once() == 0  # nothing left to deliver
    assert len(receiver.requests) == len(queued)
    for request in receiver.requests:
        assert request.path == "/hooks/inrush"
        assert signing.verify(SECRET, request.headers, request.body)
        body = json.loads(request.body)
        assert body["id"] == request.headers["webhook-id"]
        assert request.headers["content-type"] == "application/json"
    for row in rows(database):
        assert row.status == DELIVERED and row.attempts == 1 and row.delivered_at is not None
        assert row.claimed_by is None
        [attempt] = attempts(database, row.id)
        assert attempt.status_code == 200 and attempt.error is None
        assert attempt.response_excerpt == '{"received":true}'


def test_failures_are_retried_with_the_same_id_then_fail(database: Database) -> None:
    with running_receiver(default=503) as receiver:
        _, queued = seed(database, f"{receiver.url}/hook")
        first = queued[0].id
        with database.sessions.begin() as session:  # keep one message to follow
            for row in session.scalars(select(Outbox).where(Outbox.id != first)):
                session.delete(row)
        runner = worker(database)
        runner.run_once()
        [row] = rows(database)
        assert row.status == PENDING and row.attempts == 1 and row.next_attempt_at is not None
        for _ in range(20):
            if rows(database)[0].status == FAILED:
                break
            threading.Event().wait(0.03)
            runner.run_once()
    [row] = rows(database)
    assert row.status == FAILED and row.attempts == len(FAST)
    history = attempts(database, row.id)
    assert [a.attempt for a in history] == [1, 2, 3]
    assert all(a.status_code == 503 and a.error == "answered 503" for a in history)
    assert history[0].response_excerpt == "trail closed"
    assert len({r.headers["webhook-id"] for r in receiver.requests}) == 1
    assert len(receiver.requests) == 3


def test_a_retry_succeeds_after_an_outage(database: Database) -> None:
    with running_receiver(planned=[500]) as receiver:
        _, queued = seed(database, f"{receiver.url}/hook")
        runner = worker(database)
        runner.run_once()
        threading.Event().wait(0.05)
        runner.run_once()
    statuses = {r.status for r in rows(database)}
    assert statuses == {DELIVERED}
    assert len(receiver.requests) == len(queued) + 1


def test_redirects_are_not_followed(database: Database) -> None:
    with running_receiver(default=302) as receiver:
        seed(database, f"{receiver.url}/hook")
        worker(database).run_once()
    assert all(r.path == "/hook" for r in receiver.requests)  # never /moved
    first = attempts(database, rows(database)[0].id)[0]
    assert first.status_code == 302 and "not followed" in (first.error or "")


def test_internal_target_is_refused_at_delivery(database: Database) -> None:
    with running_receiver() as receiver:
        seed(database, f"{receiver.url}/hook")
        worker(database, settings=settings(webhook_allow_hosts="")).run_once()
    assert receiver.requests == []
    first = attempts(database, rows(database)[0].id)[0]
    assert first.status_code is None and "loopback" in (first.error or "")


def test_concurrent_workers_deliver_each_event_once(database: Database) -> None:
    with running_receiver() as receiver:
        _, queued = seed(database, f"{receiver.url}/hook")
        with database.sessions.begin() as session:  # more messages to race for
            incident_id = queued[0].incident_id
            for n in range(12):
                session.add(Outbox(incident_id=incident_id,
                                   experiment_id=scenario.EXPERIMENT_ID,
                                   event_type="incident.opened", event_id=f"race-{n}",
                                   payload={"type": "incident.opened", "id": f"race-{n}"},
                                   status=PENDING, attempts=0, next_attempt_at=utcnow()))
        workers = [worker(database, name=f"w{i}") for i in range(3)]
        threads = [threading.Thread(target=w.run_once) for w in workers]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join(60)
    ids = [r.headers["webhook-id"] for r in receiver.requests]
    assert len(ids) == len(set(ids)) == len(queued) + 12
    assert {r.status for r in rows(database)} == {DELIVERED}
    assert all(r.attempts == 1 for r in rows(database))


def test_expired_lease_is_taken_over_and_the_lost_attempt_recorded(database: Database) -> None:
    with running_receiver() as receiver:
        _, queued = seed(database, f"{receiver.url}/hook")
        crashed = worker(database, name="crashed")
        claim = crashed.claim_next()
        assert claim is not None and claim.attempt == 1
        now = utcnow()
        impatient = worker(database, name="impatient", clock=lambda: now)
        taken = [impatient.claim_next() for _ in range(len(queued))]
        assert claim.outbox_id not in {c.outbox_id for c in taken if c}  # lease still held
        later = now + dt.timedelta(seconds=crashed.lease_seconds + 1)
        rescuer = worker(database, name="rescuer", clock=lambda: later)
        rescued = rescuer.claim_next()
        assert rescued is not None and rescued.outbox_id == claim.outbox_id
        assert rescued.attempt == 2
        rescuer.deliver_claim(rescued)
    history = attempts(database, claim.outbox_id)
    assert [(a.attempt, a.error) for a in history] == [(1, LOST_LEASE), (2, None)]
    assert [r.headers["webhook-id"] for r in receiver.requests] == [
        next(r.event_id for r in rows(database) if r.id == claim.outbox_id)]


def test_removed_webhook_fails_the_message(database: Database) -> None:
    seed(database, "https://hooks.larkspur.example/inrush")
    with database.sessions.begin() as session:
        experiment = session.get(Experiment, scenario.EXPERIMENT_ID)
        assert experiment is not None
        experiment.webhook_url = None
    worker(database).run_once()
    assert {r.status for r in rows(database)} == {FAILED}


def test_transitions_have_incident_events(database: Database) -> None:
    _, queued = seed(database, "https://hooks.larkspur.example/inrush")
    with database.sessions() as session:
        for row in queued:
            transition = int(row.event_id.rsplit("-t", 1)[1])
            event = session.get(IncidentEvent, transition)
            assert event is not None and event.incident_id == row.incident_id
            assert event.action == "opened"
