"""/v1/experiments/{id}/observations: upsert rows (JSON or CSV) and read them back."""

from __future__ import annotations

import base64
import binascii
import datetime as dt
import json
from collections.abc import Iterator, Sequence
from typing import Annotated, Any

import msgspec
from fastapi import APIRouter, Depends, Header, Query, Request
from fastapi.responses import JSONResponse, Response, StreamingResponse
from sqlalchemy import Row, Select, Text, cast, select, tuple_
from sqlalchemy.orm import Session
from starlette.concurrency import run_in_threadpool

from detectors.errors import InputError

from ..alerting import CORRECTED_DATA, LATER_DATA
from ..analysis import NO_DATA, record_upload, rediagnose
from ..auth import require_read, require_write
from ..csvio import observations_csv_header, observations_csv_lines, write_observations_csv
from ..db.models import Observation, utcnow
from ..db.observation_store import metric_names
from ..db.session import Database, get_session
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
    IncidentCounts,
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
    the experiment is re-diagnosed on all its stored rows and incidents are updated.
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
    lines = None  # CSV: the file line of each row, for the problem document
    try:
        parsed = (parse_csv_body(body, settings.max_rows) if is_csv
                  else parse_json_body(body, settings.max_rows))
        lines = parsed.lines
        rows = validate_rows(parsed, experiment, today=utcnow().date(),
                             future_days=settings.future_days)
    except MalformedBodyError as error:
        raise ProblemError(400, f"{str(error)[:1].upper()}{str(error)[1:]}; nothing was "
                           "written.") from None
    except TooManyRowsError as error:
        raise ProblemError(413, f"The request has {error.count} rows; at most {error.limit} "
                           "are accepted per request. Split the upload.") from None
    except InputError as error:
        reader_lines = getattr(error, "lines", None)  # the CSV reader's own problems
        return input_error_response(request, error, csv_lines=is_csv,
                                    lines=lines if reader_lines is None else reader_lines)

    # One short write transaction stores the rows; the diagnosis runs after it, outside the
    # lock (service.analysis.rediagnose), and the answer reports the stored result.
    experiment = lock_experiment(session, experiment_id)
    staged = upsert_rows(session, experiment, rows)
    try:
        record_upload(session, experiment, staged)
    except InputError as error:  # past the experiment's limits: nothing is kept
        session.rollback()
        return input_error_response(request, error, csv_lines=is_csv, lines=lines)
    refresh = rediagnose(session, experiment_id,
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
                           resolved=len(refresh.alerts.resolved)),
        incidents=IncidentCounts(opened=len(refresh.incidents.opened),
                                 updated=len(refresh.incidents.updated),
                                 resolved=len(refresh.incidents.resolved)))
    return JSONResponse(result.model_dump(mode="json"))


EXPORT_PART_ROWS = 5_000  # rows per database fetch and per written part of a streamed export
MAX_PAGE_ROWS = 100_000


@router.get("", response_model=ObservationList,
            responses={**problem_responses(401, 403, 404, 406, 422),
                       200: {"content": {"text/csv": {"schema": {"type": "string"}}},
                             "description": "the stored rows, as JSON or CSV",
                             "headers": {"Link": {
                                 "description": 'rel="next": the next page (with `limit`)',
                                 "schema": {"type": "string"}}}}})
def get_observations(experiment_id: str, request: Request,
                     session: Session = Depends(get_session),
                     _: Principal = Depends(require_read),
                     first: Annotated[dt.date | None, Query(
                         alias="from", description="first date (inclusive)")] = None,
                     last: Annotated[dt.date | None, Query(
                         alias="to", description="last date (inclusive)")] = None,
                     limit: Annotated[int | None, Query(
                         ge=1, le=MAX_PAGE_ROWS,
                         description="rows per page; without it every row is streamed")] = None,
                     cursor: Annotated[str | None, Query(
                         description="`next` of the previous page")] = None,
                     accept: Annotated[str | None, Header(include_in_schema=False)] = None
                     ) -> Response:
    """The stored rows, sorted by date, arm and source (`Accept: text/csv` for CSV).

    Without `limit` the whole selection is streamed, read from the database a part at a time
    (memory does not grow with the experiment). With `limit` one page is answered; its
    `next` (in the JSON body and a `Link: rel="next"` header, for CSV too) continues after it.
    """
    get_experiment(session, experiment_id)
    chosen = preferred_media_type(accept, [JSON_MEDIA_TYPE, CSV_MEDIA_TYPE])
    if chosen is None:
        raise ProblemError(406, "This resource is available as application/json or text/csv.")
    after = decode_row_cursor(cursor) if cursor else None
    headers = {"Vary": "Accept"}
    if chosen == CSV_MEDIA_TYPE:
        headers["Content-Disposition"] = (f'attachment; filename="{experiment_id}-'
                                          'observations.csv"')
    query = _rows_query(experiment_id, first, last, after)
    if limit is not None:  # one bounded page, read at once
        found = [_row(r) for r in session.execute(query.limit(limit + 1))]
        page = found[:limit]
        next_cursor = encode_row_cursor(page[-1]) if len(found) > limit else None
        if next_cursor is not None:
            link = str(request.url.include_query_params(cursor=next_cursor))
            headers["Link"] = f'<{link}>; rel="next"'
        if chosen == CSV_MEDIA_TYPE:
            return Response(write_observations_csv(page), media_type="text/csv; charset=utf-8",
                            headers=headers)
        return JSONResponse({"rows": page, "next": next_cursor}, headers=headers)
    database = request.app.state.database
    if chosen == CSV_MEDIA_TYPE:
        names = metric_names(session, experiment_id)
        session.commit()  # the stream reads in a session of its own
        return StreamingResponse(_csv_parts(database, query, names),
                                 media_type="text/csv; charset=utf-8", headers=headers)
    session.commit()
    return StreamingResponse(_json_parts(database, query), media_type=JSON_MEDIA_TYPE,
                             headers=headers)


def _rows_query(experiment_id: str, first: dt.date | None, last: dt.date | None,
                after: tuple[dt.date, str, str] | None) -> Select[tuple[Any, ...]]:
    query = select(Observation.date, Observation.arm, Observation.source, Observation.entered,
                   Observation.metrics).where(Observation.experiment_id == experiment_id)
    if first is not None:
        query = query.where(Observation.date >= first)
    if last is not None:
        query = query.where(Observation.date <= last)
    if after is not None:
        query = query.where(tuple_(Observation.date, Observation.arm, Observation.source)
                            > tuple_(*after))
    return query.order_by(Observation.date, Observation.arm, Observation.source)


def _stored_parts(database: Database, query: Select[tuple[Any, ...]]
                  ) -> Iterator[Sequence[Row[tuple[Any, ...]]]]:
    """The rows a part at a time from one statement (a consistent view of the table; on
    PostgreSQL a server-side cursor), in a session that lives as long as the stream. Each
    row's ``metrics`` is its stored JSON text: the JSON export copies it as it is."""
    raw = query.with_only_columns(
        *query.selected_columns[:4], cast(Observation.metrics, Text).label("metrics"),
        maintain_column_froms=True)
    with database.sessions() as session:
        result = session.execute(raw.execution_options(yield_per=EXPORT_PART_ROWS))
        yield from result.partitions()


def _csv_parts(database: Database, query: Select[tuple[Any, ...]], names: list[str]
               ) -> Iterator[str]:
    yield observations_csv_header(names)
    for part in _stored_parts(database, query):
        yield observations_csv_lines(
            ({"date": r.date.isoformat(), "arm": r.arm, "source": r.source,
              "entered": r.entered, "metrics": _METRICS.decode(r.metrics)} for r in part),
            names)


_METRICS = msgspec.json.Decoder(dict[str, dict[str, int | float]])


def _json_parts(database: Database, query: Select[tuple[Any, ...]]) -> Iterator[bytes]:
    """``{"rows": [...], "next": null}``, each row's stored metrics document copied as text;
    names are encoded once each (a wide experiment repeats few arms and sources)."""
    names: dict[str, str] = {}

    def name(value: str) -> str:
        text = names.get(value)
        if text is None:
            text = names[value] = json.dumps(value, ensure_ascii=False)
        return text

    yield b'{"rows":['
    separator = ""
    for part in _stored_parts(database, query):
        text = ",".join(
            f'{{"date":"{r.date.isoformat()}","arm":{name(r.arm)},"source":{name(r.source)},'
            f'"entered":{r.entered},"metrics":{r.metrics}}}' for r in part)
        yield (separator + text).encode()
        separator = ","
    yield b'],"next":null}'


def encode_row_cursor(row: dict[str, object]) -> str:
    key = json.dumps([row["date"], row["arm"], row["source"]], ensure_ascii=False)
    return base64.urlsafe_b64encode(key.encode()).decode().rstrip("=")


def decode_row_cursor(cursor: str) -> tuple[dt.date, str, str]:
    """The key a page ended on; a 422 naming ``cursor`` for anything this service did not
    issue."""
    try:
        key = json.loads(base64.b64decode(cursor + "=" * (-len(cursor) % 4), altchars=b"-_",
                                          validate=True).decode())
        day, arm, source = key
        if not (isinstance(day, str) and isinstance(arm, str) and isinstance(source, str)):
            raise ValueError("not a row key")
        return dt.date.fromisoformat(day), arm, source
    except (binascii.Error, UnicodeDecodeError, ValueError, TypeError):
        raise ProblemError(422, "cursor is not one this service issued.", errors=[
            {"row": None, "field": "cursor", "message": "invalid cursor"}]) from None


def _row(observation: Row[tuple[Any, ...]]) -> dict[str, object]:
    return {"date": observation.date.isoformat(), "arm": observation.arm,
            "source": observation.source, "entered": observation.entered,
            "metrics": observation.metrics}
