"""Queue notifications for incident changes, in the caller's transaction (transactional outbox).

:func:`enqueue_for_changes` is called right after ``sync_incidents`` in the transaction that
writes the incidents: the notification rows commit or roll back with them, and the request
never waits on the receiver. The worker (:mod:`service.notify.worker`) delivers them later.
One row per incident transition: ``incident.opened`` (new or reopened), ``incident.updated``
(days, arm, shape or severity changed) and ``incident.resolved``.
"""

from __future__ import annotations

import datetime as dt
from typing import Any, Protocol

from sqlalchemy import select
from sqlalchemy.orm import Session

from ..db.incident_models import Incident, IncidentEvent
from ..db.models import DiagnosisSnapshot, Experiment, utcnow
from ..db.notify_models import PENDING, Outbox
from ..incidents import incident_document
from . import payload as payloads
from .settings import NotifySettings

# Incident transitions that notify, and the event type they send.
_ACTIONS = {"opened": payloads.OPENED, "reopened": payloads.OPENED,
            "updated": payloads.UPDATED, "resolved": payloads.RESOLVED}


class Changes(Protocol):
    """What ``service.incidents.sync_incidents`` returns."""

    opened: list[Incident]
    updated: list[tuple[Incident, dict[str, Any]]]
    resolved: list[Incident]


def _latest_snapshot(session: Session, experiment_id: str) -> DiagnosisSnapshot | None:
    return session.scalar(select(DiagnosisSnapshot)
                          .where(DiagnosisSnapshot.experiment_id == experiment_id)
                          .order_by(DiagnosisSnapshot.version.desc()).limit(1))


def _transition(incident: Incident, event_type: str) -> IncidentEvent | None:
    """The incident's latest transition that sends ``event_type``."""
    for event in reversed(incident.events):
        if _ACTIONS.get(event.action) == event_type:
            return event
    return None


def enqueue_incident_event(session: Session, experiment: Experiment, incident: Incident,
                           event_type: str, *, document: dict[str, Any] | None,
                           diagnosis_version: int | None, public_url: str | None,
                           now: dt.datetime | None = None) -> Outbox | None:
    """Queue one notification; ``None`` when the event is queued already (same event id)."""
    session.flush()  # ids of the incident and its transition
    transition = _transition(incident, event_type)
    if transition is None:
        raise ValueError(f"incident {incident.id} has no transition that sends {event_type}")
    event_id = payloads.event_id(incident.id, transition.id)
    if session.scalar(select(Outbox.id).where(Outbox.event_id == event_id)) is not None:
        return None
    now = now or utcnow()
    body = payloads.build_payload(
        event_type=event_type, event_id=event_id, occurred_at=transition.at.isoformat(),
        experiment={"id": experiment.id, "title": experiment.title},
        incident=incident_document(incident), changes=transition.changes, document=document,
        diagnosis_version=diagnosis_version, public_url=public_url)
    row = Outbox(incident_id=incident.id, experiment_id=experiment.id, event_type=event_type,
                 event_id=event_id, payload=body, status=PENDING, attempts=0,
                 next_attempt_at=now, created_at=now)
    session.add(row)
    return row


def enqueue_for_changes(session: Session, experiment: Experiment, changes: Changes, *,
                        public_url: str | None = None, now: dt.datetime | None = None
                        ) -> list[Outbox]:
    """Queue one notification per incident the diagnosis opened, updated or resolved.

    Nothing is queued when the experiment has no webhook. Runs inside the caller's transaction
    (after ``sync_incidents``); the caller commits. ``public_url`` defaults to
    ``INRUSH_PUBLIC_URL``.
    """
    if not experiment.webhook_url or not (changes.opened or changes.updated
                                          or changes.resolved):
        return []
    if public_url is None:
        public_url = NotifySettings().public_url
    snapshot = _latest_snapshot(session, experiment.id)
    document = snapshot.document if snapshot is not None else None
    version = snapshot.version if snapshot is not None else None
    work = [*((i, payloads.OPENED) for i in changes.opened),
            *((i, payloads.UPDATED) for i, _ in changes.updated),
            *((i, payloads.RESOLVED) for i in changes.resolved)]
    queued: list[Outbox] = []
    for incident, event_type in work:
        row = enqueue_incident_event(session, experiment, incident, event_type,
                                     document=document, diagnosis_version=version,
                                     public_url=public_url, now=now)
        if row is not None:
            queued.append(row)
    session.flush()
    return queued
