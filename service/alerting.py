"""Alerts derived from diagnoses: one alert per finding ``(experiment, kind, key)``.

Findings are the evidence of incidents (:mod:`service.incidents`, which calls
:func:`sync_alerts` and sends the notifications); an alert never notifies on its own.

``sync_alerts`` is called after every diagnosis. A new finding opens an alert; a finding seen
again only refreshes it, so re-sending data never repeats an alert. A finding that a later
diagnosis no longer contains resolves its open or acknowledged alert on the service's behalf,
saying why; if it comes back later the alert is reopened. People move alerts through
open -> acknowledged -> resolved with :func:`acknowledge` and :func:`resolve`.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Any, Protocol

from sqlalchemy import select
from sqlalchemy.dialects.postgresql import insert as postgresql_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlalchemy.orm import Session

from detectors import Diagnosis, Finding

from .db.models import Alert, AlertEvent, Experiment, utcnow
from .http import json_safe
from .tokens import SYSTEM_ACTOR

OPEN, ACKNOWLEDGED, RESOLVED = "open", "acknowledged", "resolved"
STATUSES = (OPEN, ACKNOWLEDGED, RESOLVED)

# What changed before the diagnosis, named in the reason of an automatic resolution.
CORRECTED_DATA = "corrected data"  # stored rows were replaced
LATER_DATA = "later data"  # only new rows were added
NEW_ALLOCATION = "the changed allocation schedule"


@dataclass
class AlertChanges:
    """What a diagnosis changed: alerts opened (new or reopened) and alerts it resolved."""

    opened: list[Alert] = field(default_factory=list)
    resolved: list[Alert] = field(default_factory=list)


class TransitionError(ValueError):
    """The requested lifecycle step is not allowed from the alert's current status."""


def sync_alerts(session: Session, experiment: Experiment, diagnosis: Diagnosis | None, *,
                diagnosis_version: int | None = None, now: dt.datetime | None = None,
                cause: str = CORRECTED_DATA) -> AlertChanges:
    """Bring the experiment's alerts in line with ``diagnosis`` (``None``: nothing to diagnose).

    ``cause`` says what changed since the previous diagnosis; an alert resolved here gets the
    reason "<cause> no longer supports it: <what the new diagnosis says instead>".
    Runs inside the caller's transaction; the caller commits.
    """
    now = now or utcnow()
    findings = {(f.kind, f.key): f for f in (diagnosis.findings() if diagnosis else ())}
    # Locked (PostgreSQL) and re-read, so that a person's concurrent acknowledge or resolve
    # is either seen here or waits for this transaction.
    existing = {(a.kind, a.key): a for a in session.scalars(
        select(Alert).where(Alert.experiment_id == experiment.id)
        .with_for_update(of=Alert).execution_options(populate_existing=True))}
    changes = AlertChanges()

    for identity, finding in findings.items():
        alert = existing.get(identity)
        if alert is None:
            alert = _insert_alert(session, experiment.id, finding, now)
            if alert is not None:
                _record(session, alert, "opened", None, OPEN, SYSTEM_ACTOR, None,
                        diagnosis_version, now)
                changes.opened.append(alert)
                continue
            # Inserted meanwhile by a writer outside the experiment's lock: seen again.
            alert = existing[identity] = _locked_alert(session, experiment.id, identity)
        reappeared = not alert.active
        _refresh(alert, finding, now)
        if reappeared and alert.status == RESOLVED:
            previous = alert.status
            alert.status = OPEN
            alert.opened_at = now
            alert.updated_at = now
            alert.acknowledged_at = alert.acknowledged_by = None
            alert.resolved_at = alert.resolved_by = alert.resolution_reason = None
            _record(session, alert, "reopened", previous, OPEN, SYSTEM_ACTOR,
                    "the data supports the finding again", diagnosis_version, now)
            changes.opened.append(alert)

    for identity, alert in existing.items():
        if identity in findings or not alert.active:
            continue
        alert.active = False
        alert.updated_at = now
        if alert.status in (OPEN, ACKNOWLEDGED):
            reason = f"{cause} no longer supports it: {_why_gone(alert, diagnosis)}"
            previous = alert.status
            alert.status = RESOLVED
            alert.resolved_at = now
            alert.resolved_by = SYSTEM_ACTOR
            alert.resolution_reason = reason
            _record(session, alert, "resolved", previous, RESOLVED, SYSTEM_ACTOR, reason,
                    diagnosis_version, now)
            changes.resolved.append(alert)
    session.flush()
    return changes


def acknowledge(session: Session, alert: Alert, actor: str, note: str | None = None,
                now: dt.datetime | None = None) -> Alert:
    """open -> acknowledged: someone is looking into it."""
    if alert.status != OPEN:
        raise TransitionError(f"alert {alert.id} is {alert.status}; only an open alert can be "
                              "acknowledged")
    now = now or utcnow()
    alert.status = ACKNOWLEDGED
    alert.acknowledged_at = now
    alert.acknowledged_by = actor
    alert.updated_at = now
    _record(session, alert, "acknowledged", OPEN, ACKNOWLEDGED, actor, note, None, now)
    return alert


def resolve(session: Session, alert: Alert, actor: str, note: str | None = None,
            now: dt.datetime | None = None) -> Alert:
    """open or acknowledged -> resolved, by a person."""
    if alert.status == RESOLVED:
        raise TransitionError(f"alert {alert.id} is resolved already "
                              f"(by {alert.resolved_by})")
    now = now or utcnow()
    previous = alert.status
    alert.status = RESOLVED
    alert.resolved_at = now
    alert.resolved_by = actor
    alert.resolution_reason = note or f"resolved by {actor}"
    alert.updated_at = now
    _record(session, alert, "resolved", previous, RESOLVED, actor, note, None, now)
    return alert


def _finding_fields(finding: Finding) -> dict[str, Any]:
    return {"severity": finding.severity, "title": finding.title[:500],
            "detail": json_safe(dict(finding.detail))}


def _refresh(alert: Alert, finding: Finding, now: dt.datetime) -> None:
    for name, value in _finding_fields(finding).items():
        setattr(alert, name, value)
    alert.active = True
    alert.last_seen_at = now


def _insert_alert(session: Session, experiment_id: str, finding: Finding, now: dt.datetime
                  ) -> Alert | None:
    """Insert the finding's alert unless ``(experiment, kind, key)`` exists already (``INSERT
    ... ON CONFLICT DO NOTHING``); the new alert, or ``None`` when the row existed."""
    dialect = session.get_bind().dialect.name
    if dialect not in ("postgresql", "sqlite"):
        raise RuntimeError(f"alert upserts are implemented for SQLite and PostgreSQL, not "
                           f"{dialect}")
    insert = postgresql_insert if dialect == "postgresql" else sqlite_insert
    statement = (insert(Alert)
                 .values(experiment_id=experiment_id, kind=finding.kind, key=finding.key,
                         status=OPEN, active=True, opened_at=now, last_seen_at=now,
                         updated_at=now, **_finding_fields(finding))
                 .on_conflict_do_nothing(index_elements=["experiment_id", "kind", "key"])
                 .returning(Alert.id))
    alert_id = session.scalar(statement)
    return None if alert_id is None else session.get(Alert, alert_id)


def _locked_alert(session: Session, experiment_id: str, identity: tuple[str, str]) -> Alert:
    kind, key = identity
    return session.scalars(
        select(Alert).where(Alert.experiment_id == experiment_id, Alert.kind == kind,
                            Alert.key == key)
        .with_for_update(of=Alert).execution_options(populate_existing=True)).one()


def _record(session: Session, alert: Alert, action: str, from_status: str | None,
            to_status: str, actor: str, note: str | None, version: int | None,
            now: dt.datetime) -> None:
    alert.events.append(AlertEvent(at=now, action=action, from_status=from_status,
                                   to_status=to_status, actor=actor, note=note,
                                   diagnosis_version=version))
    session.add(alert)


def _why_gone(alert: Alert, diagnosis: Diagnosis | None) -> str:
    """A sentence on what the new diagnosis says instead of the finding."""
    if diagnosis is None:
        return "no units have entered the experiment in the stored data"
    alpha = diagnosis.config.alpha
    if alert.kind == "srm":
        return (f"the whole-period arm counts match the allocation at the alert level "
                f"p < {alpha:g} (chi-square p = {_p(diagnosis.srm.p_value)}, anytime-valid "
                f"p = {_p(diagnosis.srm.sequential_p_value)})")
    if alert.kind == "skewed_window":
        return (f"no window of days over {alert.key} reaches the alert level of the lifetime "
                f"window scan (p < {diagnosis.config.scan_alpha:g}) any more")
    if alert.kind == "share_change":
        return (f"the change detector no longer finds a change of the arm shares from "
                f"{alert.key} at its alert level (p < {diagnosis.config.change_alpha:g})")
    if alert.kind == "skewed_day":
        day = next((d for d in diagnosis.flagged_days if d.date.isoformat() == alert.key), None)
        if day is not None:
            return (f"{alert.key} is now only at the {day.severity} level (Holm-adjusted "
                    f"p = {_p(day.p_value)}, alert level p < {diagnosis.config.scan_alpha:g})")
        return (f"no window of days containing {alert.key} reaches the alert level "
                f"p < {diagnosis.config.scan_alpha:g} any more")
    if alert.kind == "skewed_source":
        source = next((s for s in diagnosis.sources if s.source == alert.key), None)
        if source is None:
            return f"source {alert.key} has no units in the stored data any more"
        return (f"source {alert.key} follows the allocation at the alert level (Holm-adjusted "
                f"anytime-valid p = {_p(source.adjusted_sequential_p_value)})")
    if alert.kind == "share_changepoint":
        return f"no change of the arm shares is detected on {alert.key} any more"
    if alert.kind == "engagement_changepoint":
        metric, _, rest = alert.key.partition(":")
        arm, _, date = rest.partition(":")
        return f"no shift of entrant {metric} in {arm} is detected on {date} any more"
    return "the latest diagnosis no longer contains this finding"


def _p(value: Any) -> str:
    try:
        return f"{float(value):.2g}"
    except (TypeError, ValueError):
        return "n/a"


class Transition(Protocol):
    def __call__(self, session: Session, alert: Alert, actor: str, note: str | None = None,
                 now: dt.datetime | None = None) -> Alert: ...
