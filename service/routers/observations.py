"""/v1/experiments/{id}/observations: upsert rows (JSON or CSV) and read them back."""

from __future__ import annotations

import datetime as dt
from typing import Annotated

from fastapi import APIRouter, Depends, Header, Query, Request
from fastapi.responses import JSONResponse, Response
from sqlalchemy.orm import Session
from starlette.concurrency import run_in_threadpool

from detectors.errors import InputError

from ..alerting import CORRECTED_DATA, LATER_DATA
from ..analysis import NO_DATA, record_upload, refresh_diagnosis, stored_rows
from ..auth import require_read, require_write
from ..csvio import write_observations_csv
from ..db.models import Observation, utcnow
from ..db.session import get_session
from ..http import CSV_MEDIA_TYPE, JSON_MEDIA_TYPE, media_type, preferred_media_type
from ..ingest import (
    MalformedBodyError,
    TooManyRowsError,
    parse_csv_body,
    parse_json_body,
    upsert_rows,
    validate_rows,
)
from ..problems import ProblemError, input_error_response
from ..schemas.common import problem_responses
from ..schemas.observations import (
    AlertCounts,
    DiagnosisRef,
    ObservationBatch,
    ObservationList,
    WriteResult,
)
from ..settings import Settings
from ..tokens import Principal
from .common import experiment_url, get_experiment, lock_experiment

router = APIRouter(prefix="/v1/experiments/{experiment_id}/observations",
                   tags=["observations"])

_BODY_DOC = {
    "requestBody": {
        "required": True,
        "content": {
            "application/json": {"schema": {"$ref": "#/components/schemas/ObservationBatch"}},
            "text/csv": {"schema": {
                "type": "string",
                "description": "header date,arm,source,entered then NAME.n,NAME.sum,NAME.sum_sq "
                               "per metric; UTF-8, an optional byte-order mark is accepted"}},
        },
    }
}
DOCUMENTED_MODELS = [ObservationBatch]


@router.put("", response_model=WriteResult, openapi_extra=_BODY_DOC,
            responses=problem_responses(400, 401, 403, 404, 413, 415, 422))
async def put_observations(experiment_id: str, request: Request,
                           session: Session = Depends(get_session),
                           _: Principal = Depends(require_write)) -> Response:
    """Upsert rows keyed by (date, arm, source): a row that exists is replaced.

    Every row is validated first; if any is invalid the answer lists each problem with its
    row and field and nothing is written. Otherwise all rows are stored in one transaction,
    the experiment is re-diagnosed on all its stored rows and alerts are updated.
    """
    kind = media_type(request.headers.get("content-type"))
    if kind not in (JSON_MEDIA_TYPE, CSV_MEDIA_TYPE) and not kind.endswith("+json"):
        raise ProblemError(415, f"Content-Type {kind or '(none)'!r} is not accepted here: send "
                           "application/json or text/csv.")
    body = await request.body()
    return await run_in_threadpool(_write, request, session, experiment_id, body,
                                   kind == CSV_MEDIA_TYPE)


def _write(request: Request, session: Session, experiment_id: str, body: bytes,
           is_csv: bool) -> Response:
    settings: Settings = request.app.state.settings
    experiment = get_experiment(session, experiment_id)
    try:
        parsed = (parse_csv_body(body, settings.max_rows) if is_csv
                  else parse_json_body(body, settings.max_rows))
        rows = validate_rows(parsed, experiment, today=utcnow().date(),
                             future_days=settings.future_days)
    except MalformedBodyError as error:
        raise ProblemError(400, f"{str(error)[:1].upper()}{str(error)[1:]}; nothing was "
                           "written.") from None
    except TooManyRowsError as error:
        raise ProblemError(413, f"The request has {error.count} rows; at most {error.limit} "
                           "are accepted per request. Split the upload.") from None
    except InputError as error:
        return input_error_response(request, error, csv_lines=is_csv)

    # One short write transaction stores the rows; the diagnosis runs after it, outside the
    # lock (service.analysis.refresh_diagnosis), and the answer reports the stored result.
    experiment = lock_experiment(session, experiment_id)
    staged = upsert_rows(session, experiment, rows)
    record_upload(session, experiment, staged)
    refresh = refresh_diagnosis(session, experiment_id,
                                cause=CORRECTED_DATA if staged.updated else LATER_DATA)
    snapshot = refresh.snapshot
    result = WriteResult(
        written=len(rows), inserted=staged.inserted, updated=staged.updated,
        diagnosis=DiagnosisRef(
            status=None if snapshot.status == NO_DATA else snapshot.status,
            as_of=snapshot.as_of.isoformat() if snapshot.as_of else None,
            version=snapshot.version,
            url=experiment_url(request, experiment_id, "/diagnosis")),
        alerts=AlertCounts(opened=len(refresh.alerts.opened),
                           resolved=len(refresh.alerts.resolved)))
    return JSONResponse(result.model_dump(mode="json"))


@router.get("", response_model=ObservationList,
            responses={**problem_responses(401, 403, 404, 406, 422),
                       200: {"content": {"text/csv": {"schema": {"type": "string"}}},
                             "description": "the stored rows, as JSON or CSV"}})
def get_observations(experiment_id: str, request: Request,
                     session: Session = Depends(get_session),
                     _: Principal = Depends(require_read),
                     first: Annotated[dt.date | None, Query(
                         alias="from", description="first date (inclusive)")] = None,
                     last: Annotated[dt.date | None, Query(
                         alias="to", description="last date (inclusive)")] = None,
                     accept: Annotated[str | None, Header(include_in_schema=False)] = None
                     ) -> Response:
    """The stored rows, sorted by date, arm and source (`Accept: text/csv` for CSV)."""
    get_experiment(session, experiment_id)
    chosen = preferred_media_type(accept, [JSON_MEDIA_TYPE, CSV_MEDIA_TYPE])
    if chosen is None:
        raise ProblemError(406, "This resource is available as application/json or text/csv.")
    rows = [_row(o) for o in stored_rows(session, experiment_id, first=first, last=last)]
    if chosen == CSV_MEDIA_TYPE:
        return Response(write_observations_csv(rows), media_type="text/csv; charset=utf-8",
                        headers={"Content-Disposition":
                                 f'attachment; filename="{experiment_id}-observations.csv"',
                                 "Vary": "Accept"})
    return JSONResponse({"rows": rows}, headers={"Vary": "Accept"})


def _row(observation: Observation) -> dict[str, object]:
    return {"date": observation.date.isoformat(), "arm": observation.arm,
            "source": observation.source, "entered": observation.entered,
            "metrics": observation.metrics}
