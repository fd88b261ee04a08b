"""/v1/experiments: create, list, show, change."""

from __future__ import annotations

import base64
import binascii
import datetime as dt
import re
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Query, Request, Response
from sqlalchemy import select
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from detectors import AllocationSchedule, InputError
from detectors.errors import Problem

from ..alerting import NEW_ALLOCATION
from ..analysis import (
    SnapshotSummary,
    bump_data_version,
    latest_snapshot,
    latest_summaries,
    rediagnose,
)
from ..auth import require_read, require_write
from ..db.models import Experiment, utcnow
from ..db.session import begin_write, get_session
from ..notify.registration import validate_webhook_url
from ..problems import ProblemError
from ..schemas.common import problem_responses
from ..schemas.experiments import (
    EXPERIMENT_ID_PATTERN,
    AllocationStep,
    DiagnosisSummary,
    ExperimentCreate,
    ExperimentOut,
    ExperimentPage,
    ExperimentPatch,
    ExperimentPatchResult,
    NotifyOut,
)
from ..tokens import Principal
from .common import base_url, experiment_url, get_experiment, lock_experiment

router = APIRouter(prefix="/v1/experiments", tags=["experiments"])

# Every day from the start is analysed on each upload, so the start must be plausible: a
# start decades back would make one request re-diagnose tens of thousands of empty days.
EARLIEST_START = dt.date(2000, 1, 1)
MAX_START_AHEAD_DAYS = 366


@router.post("", status_code=201, response_model=ExperimentOut,
             responses=problem_responses(400, 401, 403, 409, 413, 422))
def create_experiment(body: ExperimentCreate, request: Request, response: Response,
                      session: Session = Depends(get_session),
                      _: Principal = Depends(require_write)) -> ExperimentOut:
    """Create an experiment. Its id is permanent; 409 if it exists already."""
    _check_start(body.start_date)
    steps = body.allocation or [AllocationStep.model_validate(
        {"from": body.start_date, "weights": [1.0 / len(body.arms)] * len(body.arms)})]
    allocation = _schedule(body.arms, steps, body.start_date)
    if body.notify is not None:
        validate_webhook_url(str(body.notify.webhook_url))
    now = utcnow()
    experiment = Experiment(
        id=body.id, title=body.title or body.id, start_date=body.start_date,
        arms=list(body.arms), allocation=allocation, created_at=now, updated_at=now,
        webhook_url=str(body.notify.webhook_url) if body.notify else None,
        webhook_secret=body.notify.secret if body.notify else None)
    begin_write(session)
    if session.get(Experiment, body.id) is not None:
        raise _exists(body.id)
    session.add(experiment)
    try:
        session.commit()
    except IntegrityError:  # created concurrently by another request
        session.rollback()
        raise _exists(body.id) from None
    response.headers["Location"] = experiment_url(request, experiment.id)
    return experiment_out(request, session, experiment)


@router.get("", response_model=ExperimentPage, responses=problem_responses(401, 403, 422))
def list_experiments(request: Request, session: Session = Depends(get_session),
                     _: Principal = Depends(require_read),
                     limit: Annotated[int, Query(ge=1, le=500)] = 100,
                     cursor: Annotated[str | None, Query(
                         description="`next` of the previous page")] = None
                     ) -> ExperimentPage:
    """Experiments ordered by id."""
    query = select(Experiment).order_by(Experiment.id).limit(limit + 1)
    if cursor:
        query = query.where(Experiment.id > _decode_cursor(cursor))
    found = list(session.scalars(query))
    page = found[:limit]
    next_cursor = _encode_cursor(page[-1].id) if len(found) > limit else None
    summaries = latest_summaries(session, [e.id for e in page])
    return ExperimentPage(items=[experiment_out(request, session, e, summaries.get(e.id))
                                 for e in page], next=next_cursor)


@router.get("/{experiment_id}", response_model=ExperimentOut,
            responses=problem_responses(401, 403, 404))
def show_experiment(experiment_id: str, request: Request,
                    session: Session = Depends(get_session),
                    _: Principal = Depends(require_read)) -> ExperimentOut:
    return experiment_out(request, session, get_experiment(session, experiment_id))


@router.patch("/{experiment_id}", response_model=ExperimentPatchResult,
              responses=problem_responses(400, 401, 403, 404, 413, 422))
def change_experiment(experiment_id: str, body: ExperimentPatch, request: Request,
                      session: Session = Depends(get_session),
                      _: Principal = Depends(require_write)) -> ExperimentPatchResult:
    """Change the title, the allocation schedule or the notification settings.

    A new allocation re-runs the diagnosis of the stored rows (and may open or resolve alerts).
    ``notify: null`` removes notifications; a ``notify`` without ``secret`` keeps the secret.
    """
    fields = body.model_fields_set
    if "notify" in fields and body.notify is not None:  # resolves the host: before the lock
        validate_webhook_url(str(body.notify.webhook_url))
    experiment = lock_experiment(session, experiment_id)
    if "title" in fields:
        if body.title is None:
            raise ProblemError(422, "title cannot be null.",
                               errors=[{"row": None, "field": "title",
                                        "message": "must be a non-empty string"}])
        experiment.title = body.title
    allocation_changed = False
    if "allocation" in fields:
        if body.allocation is None:
            raise ProblemError(422, "allocation cannot be null.",
                               errors=[{"row": None, "field": "allocation",
                                        "message": "must be a list of steps"}])
        allocation = _schedule(experiment.arms, body.allocation, experiment.start_date)
        allocation_changed = allocation != experiment.allocation
        experiment.allocation = allocation
    if "notify" in fields:
        if body.notify is None:
            experiment.webhook_url = experiment.webhook_secret = None
        else:
            experiment.webhook_url = str(body.notify.webhook_url)
            if "secret" in body.notify.model_fields_set:
                experiment.webhook_secret = body.notify.secret
    experiment.updated_at = utcnow()
    opened = resolved = 0
    diagnosed = allocation_changed and latest_snapshot(session, experiment.id) is not None
    if allocation_changed:
        bump_data_version(session, experiment)
    session.commit()
    if diagnosed:
        refresh = rediagnose(session, experiment_id, cause=NEW_ALLOCATION)
        opened, resolved = len(refresh.alerts.opened), len(refresh.alerts.resolved)
    out = experiment_out(request, session, experiment)
    return ExperimentPatchResult(**out.model_dump(), alerts_opened=opened,
                                 alerts_resolved=resolved)


def experiment_out(request: Request, session: Session, experiment: Experiment,
                   summary: SnapshotSummary | None = None) -> ExperimentOut:
    """The experiment as answered; ``summary`` of its latest diagnosis is looked up if absent."""
    snapshot = summary or latest_summaries(session, [experiment.id]).get(experiment.id)
    diagnosis = None
    if snapshot is not None:
        diagnosis = DiagnosisSummary(
            version=snapshot.version, status=snapshot.status, as_of=snapshot.as_of,
            computed_at=snapshot.created_at,
            url=experiment_url(request, experiment.id, "/diagnosis"))
    notify = (NotifyOut(webhook_url=experiment.webhook_url,
                        has_secret=experiment.webhook_secret is not None)
              if experiment.webhook_url else None)
    return ExperimentOut(
        id=experiment.id, title=experiment.title, start_date=experiment.start_date,
        arms=list(experiment.arms), allocation=experiment.allocation, notify=notify,
        created_at=experiment.created_at, updated_at=experiment.updated_at,
        diagnosis=diagnosis, links={
            "self": experiment_url(request, experiment.id),
            "observations": experiment_url(request, experiment.id, "/observations"),
            "diagnosis": experiment_url(request, experiment.id, "/diagnosis"),
            "series": experiment_url(request, experiment.id, "/series"),
            "reweight": experiment_url(request, experiment.id, "/reweight"),
            "alerts": f"{base_url(request)}/v1/alerts?experiment={experiment.id}",
        })


def _schedule(arms: list[str], steps: list[AllocationStep], start_date: Any
              ) -> list[dict[str, Any]]:
    """Validate a schedule with the detectors' rules; the normalised steps, or 422."""
    problems: list[Problem] = []
    if len(set(arms)) != len(arms):
        problems.append(Problem("arms", "arm names must be unique"))
    else:
        try:
            schedule = AllocationSchedule.from_steps(
                arms, [{"from": s.from_, "weights": s.weights} for s in steps])
        except InputError as error:
            problems.extend(error.problems)
        else:
            if schedule.first_date > start_date:
                problems.append(Problem(
                    "allocation[0].from", f"the schedule starts on "
                    f"{schedule.first_date.isoformat()}, after the start_date "
                    f"{start_date.isoformat()}: say which weights hold from the start"))
            if not problems:
                return schedule.to_steps()
    raise InputError(problems)


def _exists(experiment_id: str) -> ProblemError:
    return ProblemError(409, f"An experiment with id {experiment_id!r} exists already.")


def _encode_cursor(value: str) -> str:
    return base64.urlsafe_b64encode(value.encode()).decode().rstrip("=")


def _check_start(start_date: dt.date) -> None:
    latest = utcnow().date() + dt.timedelta(days=MAX_START_AHEAD_DAYS)
    if start_date < EARLIEST_START:
        message = (f"{start_date.isoformat()} is before {EARLIEST_START.isoformat()}, the "
                   "earliest start accepted (every day from the start is analysed)")
    elif start_date > latest:
        message = (f"{start_date.isoformat()} is more than {MAX_START_AHEAD_DAYS} days ahead "
                   "of today")
    else:
        return
    raise InputError([Problem("start_date", message)])


def _decode_cursor(cursor: str) -> str:
    try:
        decoded = base64.b64decode(cursor + "=" * (-len(cursor) % 4), altchars=b"-_",
                                   validate=True).decode()
    except (binascii.Error, UnicodeDecodeError, ValueError):
        decoded = ""
    if not re.fullmatch(EXPERIMENT_ID_PATTERN, decoded):  # cursors are experiment ids
        raise ProblemError(422, "cursor is not one this service issued.", errors=[
            {"row": None, "field": "cursor", "message": "invalid cursor"}])
    return decoded
