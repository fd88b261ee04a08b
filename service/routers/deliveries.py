"""/v1/incidents/{incident_id}/deliveries and /v1/alerts/{alert_id}/deliveries: the webhook
notifications of an incident (or, queued before incidents, of an alert) and their attempts."""

from __future__ import annotations

from collections.abc import Iterable

from fastapi import APIRouter, Depends
from sqlalchemy import select
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
from ..tokens import Principal
from .common import MAX_BIGINT

router = APIRouter(tags=["alerts"])


@router.get("/v1/incidents/{incident_id}/deliveries", response_model=IncidentDeliveryList,
            responses=problem_responses(401, 403, 404), tags=["incidents"])
def list_incident_deliveries(incident_id: int, session: Session = Depends(get_session),
                             _: Principal = Depends(require_read)) -> IncidentDeliveryList:
    """Every notification queued for the incident, oldest first, with each delivery attempt."""
    incident = session.get(Incident, incident_id) if 1 <= incident_id <= MAX_BIGINT else None
    if incident is None:
        raise ProblemError(404, f"There is no incident {incident_id}.")
    experiment = session.get(Experiment, incident.experiment_id)
    return IncidentDeliveryList(
        incident=incident_id,
        webhook_configured=bool(experiment is not None and experiment.webhook_url),
        items=_deliveries(session.scalars(
            select(Outbox).where(Outbox.incident_id == incident_id)
            .options(selectinload(Outbox.delivery_attempts)).order_by(Outbox.id))))


@router.get("/v1/alerts/{alert_id}/deliveries", response_model=DeliveryList,
            responses=problem_responses(401, 403, 404))
def list_deliveries(alert_id: int, session: Session = Depends(get_session),
                    _: Principal = Depends(require_read)) -> DeliveryList:
    """Every notification queued for the alert, oldest first, with each delivery attempt.
    Notifications go per incident (`/v1/incidents/{id}/deliveries`); an alert has its own
    only from before incidents were kept."""
    alert = session.get(Alert, alert_id) if 1 <= alert_id <= MAX_BIGINT else None
    if alert is None:
        raise ProblemError(404, f"There is no alert {alert_id}.")
    experiment = session.get(Experiment, alert.experiment_id)
    return DeliveryList(
        alert=alert_id,
        webhook_configured=bool(experiment is not None and experiment.webhook_url),
        items=_deliveries(session.scalars(
            select(Outbox).where(Outbox.alert_id == alert_id)
            .options(selectinload(Outbox.delivery_attempts)).order_by(Outbox.id))))


def _deliveries(rows: Iterable[Outbox]) -> list[DeliveryOut]:
    return [DeliveryOut(
        id=row.id, event_id=row.event_id, event_type=row.event_type, status=row.status,
        attempts=row.attempts, next_attempt_at=row.next_attempt_at,
        created_at=row.created_at, delivered_at=row.delivered_at,
        history=[DeliveryAttemptOut(
            attempt=a.attempt, started_at=a.started_at, duration_ms=a.duration_ms,
            status_code=a.status_code, error=a.error, response_excerpt=a.response_excerpt)
            for a in row.delivery_attempts]) for row in rows]
