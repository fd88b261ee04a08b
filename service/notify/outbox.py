"""Queue notifications for alert changes, in the caller's transaction (transactional outbox).

:func:`enqueue_for_changes` is called right after ``sync_alerts`` in the transaction that
writes the alerts: the notification rows commit or roll back with them, and the request never
waits on the receiver. The worker (:mod:`service.notify.worker`) delivers them later.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Iterable
from typing import Any, Protocol

from sqlalchemy import select
from sqlalchemy.orm import Session

from ..db.models import Alert, AlertEvent, DiagnosisSnapshot, Experiment, utcnow
from ..db.notify_models import PENDING, Outbox
from . import payload as payloads
from .settings import NotifySettings

# Alert transitions that notify, and the event type they send.
_ACTIONS = {"opened": payloads.OPENED, "reopened": payloads.OPENED,
            "resolved": payloads.RESOLVED}


class Changes(Protocol):
    """What ``service.alerting.sync_alerts`` returns."""

    opened: list[Alert]
    resolved: list[Alert]


def alert_fields(alert: Alert) -> dict[str, Any]:
    """The alert as the payload builder reads it (plain JSON values)."""
    def when(value: dt.datetime | None) -> str | None:
        return value.isoformat() if value else None

    return {"id": alert.id, "kind": alert.kind, "key": alert.key, "status": alert.status,
            "severity": alert.severity, "title": alert.title, "detail": dict(alert.detail or {}),
            "opened_at": when(alert.opened_at), "resolved_at": when(alert.resolved_at),
            "resolved_by": alert.resolved_by, "resolution_reason": alert.resolution_reason}


def _latest_snapshot(session: Session, experiment_id: str) -> DiagnosisSnapshot | None:
    return session.scalar(select(DiagnosisSnapshot)
                          .where(DiagnosisSnapshot.experiment_id == experiment_id)
                          .order_by(DiagnosisSnapshot.version.desc()).limit(1))


def _transition(alert: Alert, event_type: str) -> AlertEvent | None:
    """The alert's latest transition that sends ``event_type``."""
    for event in reversed(alert.events):
        if _ACTIONS.get(event.action) == event_type:
            return event
    return None


def enqueue_alert_event(session: Session, experiment: Experiment, alert: Alert,
                        event_type: str, *, document: dict[str, Any] | None,
                        diagnosis_version: int | None, public_url: str | None,
                        now: dt.datetime | None = None) -> Outbox | None:
    """Queue one notification; ``None`` when the event is queued already (same event id)."""
    session.flush()  # ids of the alert and its transition
    transition = _transition(alert, event_type)
    if transition is None:
        raise ValueError(f"alert {alert.id} has no transition that sends {event_type}")
    event_id = payloads.event_id(alert.id, transition.id)
    if session.scalar(select(Outbox.id).where(Outbox.event_id == event_id)) is not None:
        return None
    now = now or utcnow()
    body = payloads.build_payload(
        event_type=event_type, event_id=event_id, occurred_at=transition.at.isoformat(),
        experiment={"id": experiment.id, "title": experiment.title},
        alert=alert_fields(alert), document=document, diagnosis_version=diagnosis_version,
        public_url=public_url)
    row = Outbox(alert_id=alert.id, experiment_id=experiment.id, event_type=event_type,
                 event_id=event_id, payload=body, status=PENDING, attempts=0,
                 next_attempt_at=now, created_at=now)
    session.add(row)
    return row


def enqueue_for_changes(session: Session, experiment: Experiment, changes: Changes, *,
                        public_url: str | None = None, now: dt.datetime | None = None
                        ) -> list[Outbox]:
    """Queue ``alert.opened`` / ``alert.resolved`` for every alert the diagnosis changed.

    Nothing is queued when the experiment has no webhook. Runs inside the caller's transaction
    (after ``sync_alerts``); the caller commits. ``public_url`` defaults to
    ``INRUSH_PUBLIC_URL``.
    """
    if not experiment.webhook_url or not (changes.opened or changes.resolved):
        return []
    if public_url is None:
        public_url = NotifySettings().public_url
    snapshot = _latest_snapshot(session, experiment.id)
    document = snapshot.document if snapshot is not None else None
    version = snapshot.version if snapshot is not None else None
    queued: list[Outbox] = []
    work: Iterable[tuple[Alert, str]] = [
        *((a, payloads.OPENED) for a in changes.opened),
        *((a, payloads.RESOLVED) for a in changes.resolved)]
    for alert, event_type in work:
        row = enqueue_alert_event(session, experiment, alert, event_type, document=document,
                                  diagnosis_version=version, public_url=public_url, now=now)
        if row is not None:
            queued.append(row)
    session.flush()
    return queued
