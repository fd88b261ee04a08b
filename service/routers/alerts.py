"""/v1/alerts: alert history and lifecycle (open -> acknowledged -> resolved)."""

from __future__ import annotations

import datetime as dt
from typing import Annotated

from fastapi import APIRouter, Body, Depends, Query, Request
from sqlalchemy import select
from sqlalchemy.orm import Session, selectinload

from .. import alerting
from ..auth import require_read, require_write
from ..db.models import Alert
from ..db.session import begin_write, get_session
from ..problems import ProblemError
from ..schemas.alerts import (
    AlertAction,
    AlertDetailOut,
    AlertEventOut,
    AlertOut,
    AlertPage,
    AlertStatus,
)
from ..schemas.common import problem_responses
from ..tokens import Principal
from .common import MAX_BIGINT, base_url, next_page_url

router = APIRouter(prefix="/v1/alerts", tags=["alerts"])

# The kinds of findings the detectors make, then those of findings stored by earlier versions.
KINDS = ("srm", "skewed_window", "skewed_source", "share_change",
         "skewed_day", "share_changepoint", "engagement_changepoint")


@router.get("", response_model=AlertPage, responses=problem_responses(401, 403, 422))
def list_alerts(request: Request, session: Session = Depends(get_session),
                _: Principal = Depends(require_read),
                experiment: Annotated[str | None, Query(description="experiment id")] = None,
                status: Annotated[list[AlertStatus] | None, Query(
                    description="repeat for several")] = None,
                kind: Annotated[list[str] | None, Query(
                    description=f"repeat for several: {', '.join(KINDS)}")] = None,
                since: Annotated[str | None, Query(
                    description="ISO date or datetime: alerts opened (or reopened) at or after "
                                "it; a date or a datetime without offset is UTC")] = None,
                limit: Annotated[int, Query(ge=1, le=500)] = 100,
                cursor: Annotated[str | None, Query(
                    description="`next` of the previous page")] = None) -> AlertPage:
    """Alerts, newest first, filtered by experiment, status, kind and opening time."""
    query = select(Alert).order_by(Alert.id.desc()).limit(limit + 1)
    if experiment is not None:
        query = query.where(Alert.experiment_id == experiment)
    if status:
        query = query.where(Alert.status.in_(status))
    if kind:
        unknown = sorted(set(kind) - set(KINDS))
        if unknown:
            raise _query_problem("kind", f"unknown kind(s) {unknown}; use {', '.join(KINDS)}")
        query = query.where(Alert.kind.in_(kind))
    if since is not None:
        query = query.where(Alert.opened_at >= _parse_since(since))
    if cursor is not None:
        if not (cursor.isascii() and cursor.isdigit()) or int(cursor) > MAX_BIGINT:
            raise _query_problem("cursor", "invalid cursor")
        query = query.where(Alert.id < int(cursor))
    found = list(session.scalars(query))
    page = found[:limit]
    next_cursor = str(page[-1].id) if len(found) > limit else None
    next_url = next_page_url(request, "/v1/alerts", next_cursor)
    return AlertPage(items=[alert_out(request, a) for a in page], next=next_cursor,
                     next_url=next_url)


@router.get("/{alert_id}", response_model=AlertDetailOut,
            responses=problem_responses(401, 403, 404))
def show_alert(alert_id: int, request: Request, session: Session = Depends(get_session),
               _: Principal = Depends(require_read)) -> AlertDetailOut:
    """One alert with its full history of transitions."""
    return _detail(request, _get(session, alert_id))


@router.post("/{alert_id}/acknowledge", response_model=AlertDetailOut,
             responses=problem_responses(400, 401, 403, 404, 409, 422))
def acknowledge_alert(alert_id: int, request: Request,
                      body: Annotated[AlertAction | None, Body()] = None,
                      session: Session = Depends(get_session),
                      principal: Principal = Depends(require_write)) -> AlertDetailOut:
    """open -> acknowledged, recording who and when (409 from any other status)."""
    return _transition(request, session, alert_id, principal, body, alerting.acknowledge)


@router.post("/{alert_id}/resolve", response_model=AlertDetailOut,
             responses=problem_responses(400, 401, 403, 404, 409, 422))
def resolve_alert(alert_id: int, request: Request,
                  body: Annotated[AlertAction | None, Body()] = None,
                  session: Session = Depends(get_session),
                  principal: Principal = Depends(require_write)) -> AlertDetailOut:
    """open or acknowledged -> resolved, recording who, when and the note (409 if resolved)."""
    return _transition(request, session, alert_id, principal, body, alerting.resolve)


def alert_out(request: Request, alert: Alert) -> AlertOut:
    return AlertOut(
        id=alert.id, experiment=alert.experiment_id, kind=alert.kind, key=alert.key,
        status=alert.status,  # type: ignore[arg-type]
        severity=alert.severity, title=alert.title, detail=alert.detail, active=alert.active,
        opened_at=alert.opened_at, last_seen_at=alert.last_seen_at,
        acknowledged_at=alert.acknowledged_at, acknowledged_by=alert.acknowledged_by,
        resolved_at=alert.resolved_at, resolved_by=alert.resolved_by,
        resolution_reason=alert.resolution_reason,
        url=f"{base_url(request)}/v1/alerts/{alert.id}")


def _detail(request: Request, alert: Alert) -> AlertDetailOut:
    return AlertDetailOut(
        **alert_out(request, alert).model_dump(),
        events=[AlertEventOut(at=e.at, action=e.action, from_status=e.from_status,
                              to_status=e.to_status, actor=e.actor, note=e.note,
                              diagnosis_version=e.diagnosis_version) for e in alert.events])


def _transition(request: Request, session: Session, alert_id: int, principal: Principal,
                body: AlertAction | None, step: alerting.Transition) -> AlertDetailOut:
    begin_write(session)
    alert = _get(session, alert_id, for_update=True)
    try:
        step(session, alert, principal.name, body.note if body else None)
    except alerting.TransitionError as error:
        raise ProblemError(409, f"{error}.", current_status=alert.status) from None
    session.commit()
    return _detail(request, alert)


def _get(session: Session, alert_id: int, *, for_update: bool = False) -> Alert:
    if not 1 <= alert_id <= MAX_BIGINT:  # ids start at 1
        raise ProblemError(404, f"There is no alert {alert_id}.")
    query = select(Alert).where(Alert.id == alert_id).options(selectinload(Alert.events))
    if for_update:
        query = query.with_for_update(of=Alert)
    alert = session.scalar(query)
    if alert is None:
        raise ProblemError(404, f"There is no alert {alert_id}.")
    return alert


def _parse_since(text: str) -> dt.datetime:
    try:
        value = (dt.datetime.combine(dt.date.fromisoformat(text), dt.time())
                 if len(text.strip()) == 10 else dt.datetime.fromisoformat(text.strip()))
    except ValueError:
        raise _query_problem("since", "must be an ISO date (YYYY-MM-DD) or datetime "
                             "(YYYY-MM-DDTHH:MM:SS[+HH:MM])") from None
    try:  # the comparison runs in UTC; an offset can push year 1 or 9999 out of range
        return (value.replace(tzinfo=dt.UTC) if value.tzinfo is None
                else value.astimezone(dt.UTC))
    except OverflowError:
        raise _query_problem("since", "lies outside the years 1 to 9999 in UTC") from None


def _query_problem(field: str, message: str) -> ProblemError:
    return ProblemError(422, f"Query parameter {field} is invalid: {message}.",
                        errors=[{"row": None, "field": field, "message": message,
                                 "in": "query"}])
