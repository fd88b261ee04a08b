"""/v1/experiments/{id}/pull: the experiment's daily pull config and its runs."""

from __future__ import annotations

from fastapi import APIRouter, Depends, Request, Response
from sqlalchemy import select
from sqlalchemy.orm import Session

from detectors.errors import InputError

from ..auth import require_admin, require_read, require_write
from ..db.models import utcnow
from ..db.pull_models import PullRun, PullSchedule
from ..db.session import get_session
from ..problems import ProblemError, input_error_response
from ..schemas.common import problem_responses
from ..schemas.pulls import PullConfigIn, PullOut, PullRunIn, PullRunOut
from ..tokens import Principal
from ..warehouse.config import config_from_dict
from .common import get_experiment

router = APIRouter(prefix="/v1/experiments/{experiment_id}/pull", tags=["pull"])

RECENT_RUNS = 30


@router.put("", response_model=PullOut,
            responses=problem_responses(400, 401, 403, 404, 413, 422))
def put_pull(experiment_id: str, body: PullConfigIn, request: Request,
             session: Session = Depends(get_session),
             _: Principal = Depends(require_admin)) -> Response | PullOut:
    """Set the config that `inrush serve` pulls this experiment with once a day (admin scope:
    the config names files and databases the service can read). 422 names each wrong key."""
    get_experiment(session, experiment_id)
    try:
        config = config_from_dict(body.config)
    except InputError as error:
        return input_error_response(request, error)
    row = session.get(PullSchedule, experiment_id)
    document = config.model_dump(mode="json", exclude_none=True)
    if row is None:
        row = PullSchedule(experiment_id=experiment_id, config=document, updated_at=utcnow())
        session.add(row)
    else:
        row.config, row.updated_at = document, utcnow()
    session.commit()
    return pull_out(request, session, experiment_id, row)


@router.get("", response_model=PullOut, responses=problem_responses(401, 403, 404))
def get_pull(experiment_id: str, request: Request, session: Session = Depends(get_session),
             _: Principal = Depends(require_read)) -> PullOut:
    """The pull config and the latest runs with their reports and errors (404 when the
    experiment has neither)."""
    get_experiment(session, experiment_id)
    row = session.get(PullSchedule, experiment_id)
    out = pull_out(request, session, experiment_id, row)
    if row is None and not out.runs:
        raise ProblemError(404, f"Experiment {experiment_id!r} has no pull config or runs.")
    return out


@router.post("/runs", status_code=201, response_model=PullRunOut,
             responses=problem_responses(400, 401, 403, 404, 413, 422))
def post_run(experiment_id: str, body: PullRunIn, session: Session = Depends(get_session),
             _: Principal = Depends(require_write)) -> PullRunOut:
    """Record a pull that ran elsewhere (``inrush pull --upload`` sends its report after the
    cube), so its crossed units and empty days show here and on the status page. A run for
    the same ``as_of`` is replaced."""
    get_experiment(session, experiment_id)
    run = session.scalar(select(PullRun).where(PullRun.experiment_id == experiment_id,
                                               PullRun.as_of == body.as_of))
    now = utcnow()
    if run is None:
        run = PullRun(experiment_id=experiment_id, as_of=body.as_of)
        session.add(run)
    run.state, run.started_at, run.finished_at = "ok", now, now
    run.written, run.report, run.error = body.written, body.report, None
    session.commit()
    return PullRunOut(as_of=run.as_of, state=run.state, started_at=run.started_at,
                      finished_at=run.finished_at, written=run.written, report=run.report,
                      error=None)


@router.delete("", status_code=204, responses=problem_responses(401, 403, 404))
def delete_pull(experiment_id: str, session: Session = Depends(get_session),
                _: Principal = Depends(require_admin)) -> Response:
    """Stop the daily pull (its run history stays)."""
    get_experiment(session, experiment_id)
    row = session.get(PullSchedule, experiment_id)
    if row is None:
        raise ProblemError(404, f"Experiment {experiment_id!r} has no pull config.")
    session.delete(row)
    session.commit()
    return Response(status_code=204)


def recent_runs(session: Session, experiment_id: str, limit: int = RECENT_RUNS
                ) -> list[PullRunOut]:
    runs = session.scalars(select(PullRun).where(PullRun.experiment_id == experiment_id)
                           .order_by(PullRun.as_of.desc(), PullRun.id.desc()).limit(limit))
    return [PullRunOut(as_of=r.as_of, state=r.state, started_at=r.started_at,
                       finished_at=r.finished_at, written=r.written, report=r.report,
                       error=r.error) for r in runs]


def pull_out(request: Request, session: Session, experiment_id: str,
             row: PullSchedule | None) -> PullOut:
    return PullOut(experiment=experiment_id, config=row.config if row else None,
                   runs_at=request.app.state.settings.pull_at,
                   updated_at=row.updated_at if row else None,
                   runs=recent_runs(session, experiment_id))
