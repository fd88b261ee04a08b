"""/v1/incidents/{incident_id}/deliveries and /v1/alerts/{alert_id}/deliveries: the webhook
notifications of an incident (or, queued before incidents, of an alert) and their attempts."""

from __future__ import annotations

from collections.abc import Iterable

from fastapi import APIRouter, Depends
from sqlalchemy import ColumnElement, select
from sqlalchemy.orm import Session, selectinload

from ..auth import require_read
from ..db.incident_models import Incident
from ..db.models import Alert, Experiment
from ..db.notify_models import Outbox
from ..db.session import get_session
from ..problems import ProblemError
from ..schemas.common import problem_responses
from ..schemas.deliveries import (
    DeliveryAttemptOut,
    DeliveryList,
    DeliveryOut,
    IncidentDeliveryList,
)
from ..tokens import Principal, Scope
from .common import MAX_BIGINT

router = APIRouter(tags=["alerts"])


@router.get("/v1/incidents/{incident_id}/deliveries", response_model=IncidentDeliveryList,
            responses=problem_responses(401, 403, 404), tags=["incidents"])
def list_incident_deliveries(incident_id: int, session: Session = Depends(get_session),
                             principal: Principal = Depends(require_read)
                             ) -> IncidentDeliveryList:
    """Every notification queued for the incident, oldest first, with each delivery attempt;
    what the receiver answered is shown to write and admin tokens only."""
    incident = session.get(Incident, incident_id) if 1 <= incident_id <= MAX_BIGINT else None
    if incident is None:
        raise ProblemError(404, f"There is no incident {incident_id}.")
    configured, items = _queued(session, Outbox.incident_id == incident_id,
                                incident.experiment_id, principal.scope >= Scope.write)
    return IncidentDeliveryList(incident=incident_id, webhook_configured=configured, items=items)


@router.get("/v1/alerts/{alert_id}/deliveries", response_model=DeliveryList,
            responses=problem_responses(401, 403, 404))
def list_deliveries(alert_id: int, session: Session = Depends(get_session),
                    principal: Principal = Depends(require_read)) -> DeliveryList:
    """Every notification queued for the alert, oldest first, with each delivery attempt.
    Notifications go per incident (`/v1/incidents/{id}/deliveries`); an alert has its own
    only from before incidents were kept.

    What the receiver answered (the start of its reply, a redirect's target) is shown to
    write and admin tokens only: a receiver may sit on an internal network whose replies a
    read token should not see."""
    alert = session.get(Alert, alert_id) if 1 <= alert_id <= MAX_BIGINT else None
    if alert is None:
        raise ProblemError(404, f"There is no alert {alert_id}.")
    configured, items = _queued(session, Outbox.alert_id == alert_id, alert.experiment_id,
                                principal.scope >= Scope.write)
    return DeliveryList(alert=alert_id, webhook_configured=configured, items=items)


def _queued(session: Session, owner: ColumnElement[bool], experiment_id: str, full: bool
            ) -> tuple[bool, list[DeliveryOut]]:
    """Whether the experiment has a webhook, and the notifications ``owner`` selects, oldest
    first, with their attempts."""
    experiment = session.get(Experiment, experiment_id)
    rows = session.scalars(select(Outbox).where(owner)
                           .options(selectinload(Outbox.delivery_attempts)).order_by(Outbox.id))
    return bool(experiment is not None and experiment.webhook_url), _deliveries(rows, full)


def _deliveries(rows: Iterable[Outbox], full: bool) -> list[DeliveryOut]:
    """``full``: with what the receiver answered (write and admin tokens only)."""
    return [DeliveryOut(
        id=row.id, event_id=row.event_id, event_type=row.event_type, status=row.status,
        attempts=row.attempts, next_attempt_at=row.next_attempt_at,
        created_at=row.created_at, delivered_at=row.delivered_at,
        history=[DeliveryAttemptOut(
            attempt=a.attempt, started_at=a.started_at, duration_ms=a.duration_ms,
            status_code=a.status_code,
            error=a.error if full else _without_receiver_text(a.error, a.status_code),
            response_excerpt=a.response_excerpt if full else None)
            for a in row.delivery_attempts]) for row in rows]


def _without_receiver_text(error: str | None, status: int | None) -> str | None:
    """The attempt's error for a read token: a redirect's target (the receiver's text) cut."""
    if error is not None and status is not None and 300 <= status < 400:
        return f"answered {status}, a redirect; redirects are not followed"
    return error
