"""/v1/experiments/{id}/diagnosis, /series and /diagnoses: the stored diagnoses."""

from __future__ import annotations

import datetime as dt
from typing import Annotated, Any

from fastapi import APIRouter, Depends, Header, Query
from fastapi.responses import Response
from sqlalchemy import select
from sqlalchemy.orm import Session

from ..analysis import latest_snapshot, snapshot_version
from ..auth import require_read
from ..db.models import DiagnosisSnapshot
from ..db.session import get_session
from ..http import JSON_MEDIA_TYPE, canonical_json, entity_tag, etag_matches
from ..http_cache import REVALIDATE
from ..incidents import served_document
from ..problems import ProblemError
from ..schemas.common import problem_responses
from ..schemas.diagnosis import DiagnosisDocument, SeriesDocument, SnapshotList, SnapshotOut
from ..tokens import Principal
from .common import MAX_INT, get_experiment

router = APIRouter(prefix="/v1/experiments/{experiment_id}", tags=["diagnosis"])

_CONDITIONAL = {304: {"description": "Not modified (the If-None-Match tag is current)"}}


@router.get("/diagnosis", response_model=DiagnosisDocument,
            responses={**_CONDITIONAL, **problem_responses(401, 403, 404)})
def get_diagnosis(experiment_id: str, session: Session = Depends(get_session),
                  _: Principal = Depends(require_read),
                  version: Annotated[int | None, Query(
                      ge=1, description="an earlier diagnosis (default: the latest)")] = None,
                  if_none_match: Annotated[str | None, Header()] = None) -> Response:
    """The latest diagnosis document, with an ETag; `If-None-Match` answers 304 when current.

    Each of its `incidents` carries the stored incident's `id`, `status`, `opened_at`,
    `acknowledged_at`, `resolved_at`, `resolution` and `explained_by`; the ETag changes when
    any of them does. An earlier `version` is served as it was computed, without them."""
    # A current If-None-Match of the latest diagnosis is answered before routing
    # (service.revalidation); one that reaches here is checked against the loaded snapshot.
    snapshot = _snapshot(session, experiment_id, version)
    document, etag = served_document(session, snapshot)
    if document is None:
        raise _no_diagnosis(experiment_id)
    return _conditional(document, etag, snapshot.version, if_none_match)


@router.get("/series", response_model=SeriesDocument,
            responses={**_CONDITIONAL, **problem_responses(401, 403, 404)})
def get_series(experiment_id: str, session: Session = Depends(get_session),
               _: Principal = Depends(require_read),
               first: Annotated[dt.date | None, Query(
                   alias="from", description="first day (inclusive)")] = None,
               last: Annotated[dt.date | None, Query(
                   alias="to", description="last day (inclusive)")] = None,
               if_none_match: Annotated[str | None, Header()] = None) -> Response:
    """Per day and arm: units, observed and planned share, flags; units per source and day.

    `from` and `to` keep only the days between them (every per-day list is cut alike), so a
    dashboard of a long, wide experiment can fetch the days it shows."""
    snapshot = _snapshot(session, experiment_id, None)
    if snapshot.series is None:
        raise _no_diagnosis(experiment_id)
    if first is None and last is None:
        return _conditional(snapshot.series, snapshot.series_etag, snapshot.version,
                            if_none_match)
    ranged = series_between(snapshot.series, first, last)
    tag = entity_tag([snapshot.series_etag, str(first), str(last)])
    return _conditional(ranged, tag, snapshot.version, if_none_match)


def series_between(series: dict[str, Any], first: dt.date | None, last: dt.date | None
                   ) -> dict[str, Any]:
    """The series document restricted to the days from ``first`` to ``last`` (inclusive)."""
    low = first.isoformat() if first else ""
    high = last.isoformat() if last else "9999-12-31"
    dates = list(series.get("dates", []))
    keep = [i for i, day in enumerate(dates) if low <= day <= high]
    start, stop = (keep[0], keep[-1] + 1) if keep else (0, 0)  # the dates are contiguous
    return {**series, "dates": dates[start:stop],
            "days": [d for d in series.get("days", []) if low <= d["date"] <= high],
            "sources": [{**source, "entered": {arm: counts[start:stop] for arm, counts
                                               in source["entered"].items()}}
                        for source in series.get("sources", [])]}


@router.get("/diagnoses", response_model=SnapshotList, responses=problem_responses(401, 403, 404))
def list_diagnoses(experiment_id: str, session: Session = Depends(get_session),
                   _: Principal = Depends(require_read),
                   limit: Annotated[int, Query(ge=1, le=500)] = 100) -> SnapshotList:
    """The history of distinct diagnoses, newest first (fetch one with `diagnosis?version=`)."""
    get_experiment(session, experiment_id)
    snapshots = session.scalars(
        select(DiagnosisSnapshot).where(DiagnosisSnapshot.experiment_id == experiment_id)
        .order_by(DiagnosisSnapshot.version.desc()).limit(limit))
    # The latest is served with its incidents' lifecycle fields, under their tag.
    return SnapshotList(items=[SnapshotOut(version=s.version, status=s.status, as_of=s.as_of,
                                           computed_at=s.created_at,
                                           etag=(s.served_etag or s.etag) if n == 0 else s.etag)
                               for n, s in enumerate(snapshots)])


def _snapshot(session: Session, experiment_id: str, version: int | None) -> DiagnosisSnapshot:
    get_experiment(session, experiment_id)
    snapshot = (latest_snapshot(session, experiment_id) if version is None
                else snapshot_version(session, experiment_id, version)
                if version <= MAX_INT else None)
    if snapshot is None:
        if version is not None:
            raise ProblemError(404, f"Experiment {experiment_id!r} has no diagnosis version "
                               f"{version}.")
        raise _no_diagnosis(experiment_id)
    return snapshot


def _no_diagnosis(experiment_id: str) -> ProblemError:
    return ProblemError(404, f"Experiment {experiment_id!r} has no diagnosis yet: no units "
                        "have been uploaded.", slug="no-diagnosis")


def _conditional(document: dict[str, Any], etag: str, version: int,
                 if_none_match: str | None) -> Response:
    headers = {"ETag": etag, "Cache-Control": REVALIDATE,
               "X-Inrush-Diagnosis-Version": str(version)}
    if etag_matches(if_none_match, etag):
        return Response(status_code=304, headers=headers)
    return Response(canonical_json(document), media_type=JSON_MEDIA_TYPE, headers=headers)
