"""/v1/incidents and /v1/experiments/{id}/incidents: incidents and their lifecycle
(open -> acknowledged -> resolved)."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Body, Depends, Query, Request
from sqlalchemy import Select, select
from sqlalchemy.orm import Session, selectinload

from .. import incidents
from ..auth import require_read, require_write
from ..db.incident_models import Incident
from ..db.locks import hold_experiment_lock
from ..db.session import begin_write, get_session
from ..problems import ProblemError
from ..schemas.common import problem_responses
from ..schemas.incidents import (
    IncidentAction,
    IncidentDetailOut,
    IncidentEventOut,
    IncidentOut,
    IncidentPage,
    IncidentStatus,
    Shape,
)
from ..tokens import Principal
from .alerts import _parse_since as parse_since
from .alerts import _query_problem as query_problem
from .common import MAX_BIGINT, base_url, get_experiment, next_page_url

router = APIRouter(tags=["incidents"])

StatusFilter = Annotated[list[IncidentStatus] | None, Query(description="repeat for several")]
ShapeFilter = Annotated[list[Shape] | None, Query(description="repeat for several")]
Since = Annotated[str | None, Query(
    description="ISO date or datetime: incidents opened (or reopened) at or after it; a date "
                "or a datetime without offset is UTC")]
Limit = Annotated[int, Query(ge=1, le=500)]
Cursor = Annotated[str | None, Query(description="`next` of the previous page")]


@router.get("/v1/incidents", response_model=IncidentPage,
            responses=problem_responses(401, 403, 422))
def list_incidents(request: Request, session: Session = Depends(get_session),
                   _: Principal = Depends(require_read),
                   experiment: Annotated[str | None, Query(description="experiment id")] = None,
                   status: StatusFilter = None, shape: ShapeFilter = None, since: Since = None,
                   limit: Limit = 100, cursor: Cursor = None) -> IncidentPage:
    """Incidents, newest first, filtered by experiment, status, shape and opening time."""
    return _page(request, session, "/v1/incidents", experiment, status, shape, since, limit,
                 cursor)


@router.get("/v1/experiments/{experiment_id}/incidents", response_model=IncidentPage,
            responses=problem_responses(401, 403, 404, 422))
def list_experiment_incidents(experiment_id: str, request: Request,
                              session: Session = Depends(get_session),
                              _: Principal = Depends(require_read),
                              status: StatusFilter = None, shape: ShapeFilter = None,
                              since: Since = None, limit: Limit = 100,
                              cursor: Cursor = None) -> IncidentPage:
    """The experiment's incidents, newest first (404 when the experiment does not exist)."""
    get_experiment(session, experiment_id)
    return _page(request, session, f"/v1/experiments/{experiment_id}/incidents", experiment_id,
                 status, shape, since, limit, cursor)


@router.get("/v1/incidents/{incident_id}", response_model=IncidentDetailOut,
            responses=problem_responses(401, 403, 404))
def show_incident(incident_id: int, request: Request, session: Session = Depends(get_session),
                  _: Principal = Depends(require_read)) -> IncidentDetailOut:
    """One incident with its evidence and full history of transitions and updates."""
    return _detail(request, _get(session, incident_id))


@router.post("/v1/incidents/{incident_id}/acknowledge", response_model=IncidentDetailOut,
             responses=problem_responses(400, 401, 403, 404, 409, 422))
def acknowledge_incident(incident_id: int, request: Request,
                         body: Annotated[IncidentAction | None, Body()] = None,
                         session: Session = Depends(get_session),
                         principal: Principal = Depends(require_write)) -> IncidentDetailOut:
    """open -> acknowledged, recording who and when (409 from any other status)."""
    return _transition(request, session, incident_id, principal, body, incidents.acknowledge)


@router.post("/v1/incidents/{incident_id}/resolve", response_model=IncidentDetailOut,
             responses=problem_responses(400, 401, 403, 404, 409, 422))
def resolve_incident(incident_id: int, request: Request,
                     body: Annotated[IncidentAction | None, Body()] = None,
                     session: Session = Depends(get_session),
                     principal: Principal = Depends(require_write)) -> IncidentDetailOut:
    """open or acknowledged -> resolved, recording who, when and the note (409 if resolved).
    While the data still shows the episode it stays this incident; it is reopened if the
    episode grows by new days."""
    return _transition(request, session, incident_id, principal, body, incidents.resolve)


def _page(request: Request, session: Session, path: str, experiment: str | None,
          status: list[IncidentStatus] | None, shape: list[Shape] | None, since: str | None,
          limit: int, cursor: str | None) -> IncidentPage:
    query: Select[tuple[Incident]] = (select(Incident).order_by(Incident.id.desc())
                                      .limit(limit + 1)
                                      .options(selectinload(Incident.evidence)))
    if experiment is not None:
        query = query.where(Incident.experiment_id == experiment)
    if status:
        query = query.where(Incident.status.in_(status))
    if shape:
        query = query.where(Incident.shape.in_(shape))
    if since is not None:
        query = query.where(Incident.opened_at >= parse_since(since))
    if cursor is not None:
        if not (cursor.isascii() and cursor.isdigit()) or int(cursor) > MAX_BIGINT:
            raise query_problem("cursor", "invalid cursor")
        query = query.where(Incident.id < int(cursor))
    found = list(session.scalars(query))
    page = found[:limit]
    next_cursor = str(page[-1].id) if len(found) > limit else None
    next_url = next_page_url(request, path, next_cursor)
    return IncidentPage(items=[incident_out(request, i) for i in page], next=next_cursor,
                        next_url=next_url)


def incident_out(request: Request, incident: Incident) -> IncidentOut:
    document = incidents.incident_document(incident)
    kept = {(a.kind, a.key): a.id for a in incident.evidence}
    evidence = [{**e, "alert": kept.get((e.get("kind"), e.get("key")))}
                for e in document.get("evidence") or []]
    fields: dict[str, Any] = {name: document.get(name) for name in IncidentOut.model_fields}
    fields.update(
        evidence=evidence, daily=document.get("daily") or [],
        sources=document.get("sources") or [], campaigns=document.get("campaigns") or [],
        advice=document.get("advice") or [], impact=document.get("impact") or {},
        context=document.get("context") or [], detected_by=document.get("detected_by") or [],
        active=incident.active, opened_at=incident.opened_at,
        last_seen_at=incident.last_seen_at, acknowledged_at=incident.acknowledged_at,
        acknowledged_by=incident.acknowledged_by, resolved_at=incident.resolved_at,
        resolved_by=incident.resolved_by,
        url=f"{base_url(request)}/v1/incidents/{incident.id}")
    return IncidentOut.model_validate(fields)


def _detail(request: Request, incident: Incident) -> IncidentDetailOut:
    return IncidentDetailOut(
        **incident_out(request, incident).model_dump(),
        events=[IncidentEventOut(at=e.at, action=e.action, from_status=e.from_status,
                                 to_status=e.to_status, actor=e.actor, note=e.note,
                                 changes=e.changes, diagnosis_version=e.diagnosis_version)
                for e in incident.events])


def _transition(request: Request, session: Session, incident_id: int, principal: Principal,
                body: IncidentAction | None, step: incidents.Transition) -> IncidentDetailOut:
    begin_write(session)
    experiment_id = _get(session, incident_id).experiment_id
    # The experiment's write lock first, as a diagnosis takes it: the served tag of the
    # diagnosis document is recomputed from every incident of the experiment.
    hold_experiment_lock(session, experiment_id)
    incident = _get(session, incident_id, for_update=True)
    try:
        step(session, incident, principal.name, body.note if body else None)
    except incidents.TransitionError as error:
        raise ProblemError(409, f"{error}.", current_status=incident.status) from None
    session.commit()
    return _detail(request, _get(session, incident_id))


def _get(session: Session, incident_id: int, *, for_update: bool = False) -> Incident:
    if not 1 <= incident_id <= MAX_BIGINT:  # ids start at 1
        raise ProblemError(404, f"There is no incident {incident_id}.")
    query = (select(Incident).where(Incident.id == incident_id)
             .options(selectinload(Incident.events), selectinload(Incident.evidence)))
    if for_update:
        query = query.with_for_update(of=Incident).execution_options(populate_existing=True)
    incident = session.scalar(query)
    if incident is None:
        raise ProblemError(404, f"There is no incident {incident_id}.")
    return incident
