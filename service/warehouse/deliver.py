"""Where a pulled cube goes: a CSV file, a running Inrush (HTTP), or the local database.

Every path checks the cube against the experiment first (arms declared, dates in range) and
sends it whole, in one request or one transaction: nothing partial is ever written.
"""

from __future__ import annotations

import datetime as dt
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from detectors.errors import InputError, Problem

from ..csvio import write_observations_csv
from .cube import Cube

# Answers worth another try: the service restarting, overloaded or behind a proxy's timeout.
_RETRY_STATUSES = frozenset({429, 502, 503, 504})


@dataclass(frozen=True)
class Delivered:
    written: int
    status: str | None  # the experiment's diagnosis status after the write
    detail: dict[str, Any]


def check_arms(cube: Cube, arms: Sequence[str], experiment: str) -> None:
    unknown = [a for a in cube.arms if a not in arms]
    if unknown:
        raise InputError([Problem("arm", f"the exposures name arm(s) {', '.join(unknown)}, "
                                  f"which experiment {experiment!r} does not declare (its arms: "
                                  f"{', '.join(arms)}); nothing was written")])


def write_csv(cube: Cube, path: Path | None) -> str:
    """The observation CSV (``service.csvio``'s layout); written to ``path`` when given."""
    text = write_observations_csv(cube.rows)
    if path is not None:
        path.write_text(text, encoding="utf-8")
    return text


def upload(cube: Cube, *, url: str, token: str | None, experiment: str,
           report: dict[str, Any] | None = None, attempts: int = 4,
           timeout: float = 60.0) -> Delivered:
    """PUT the whole cube as one CSV upload to the service at ``url``."""
    import httpx

    headers = {"Authorization": f"Bearer {token}"} if token else {}
    transport = httpx.HTTPTransport(retries=2)  # connection failures, before any byte is sent
    with httpx.Client(base_url=url.rstrip("/"), headers=headers, timeout=timeout,
                      transport=transport) as client:
        return upload_with(client, cube, experiment=experiment, report=report,
                           attempts=attempts)


def upload_with(client: Any, cube: Cube, *, experiment: str,
                report: dict[str, Any] | None = None, attempts: int = 4) -> Delivered:
    """The upload through an ``httpx.Client`` (base URL and credentials set). The PUT is an
    upsert, so re-sending after a failed attempt is safe: failures are retried with backoff.
    With ``report`` (:meth:`PullResult.report`), the run is then recorded on the experiment's
    pull resource, where the status page shows its crossed units; a failure to record it is
    returned in ``detail["report_error"]``, the cube being written already."""
    found = _send(client, "GET", f"/v1/experiments/{experiment}", attempts)
    arms = found.json()["arms"]
    check_arms(cube, arms, experiment)
    body = write_observations_csv(cube.with_arms(arms).rows)
    answer = _send(client, "PUT", f"/v1/experiments/{experiment}/observations", attempts,
                   content=body.encode("utf-8"),
                   headers={"Content-Type": "text/csv; charset=utf-8"})
    document = answer.json()
    if report is not None:
        try:
            _send(client, "POST", f"/v1/experiments/{experiment}/pull/runs", attempts,
                  json={"as_of": report["as_of"], "written": document.get("written"),
                        "report": report})
        except UploadError as error:
            document = {**document, "report_error": str(error)}
    return Delivered(int(document.get("written", 0)),
                     (document.get("diagnosis") or {}).get("status"), document)


class UploadError(RuntimeError):
    """The service refused the request or could not be reached (message says which)."""

    def __init__(self, message: str, problem: dict[str, Any] | None = None) -> None:
        super().__init__(message)
        self.problem = problem


def _send(client: Any, method: str, path: str, attempts: int, **kwargs: Any) -> Any:
    import httpx

    delay = 1.0
    for attempt in range(1, attempts + 1):
        try:
            response = client.request(method, path, **kwargs)
        except httpx.TransportError as error:
            if attempt == attempts:
                raise UploadError(f"{method} {client.base_url}{path}: {error}") from None
        else:
            if response.status_code not in _RETRY_STATUSES or attempt == attempts:
                if response.status_code >= 400:
                    problem = _problem(response)
                    detail = (problem or {}).get("detail") or response.text[:300]
                    raise UploadError(f"{method} {path} -> {response.status_code}: {detail}",
                                      problem)
                return response
        time.sleep(delay)
        delay *= 2
    raise AssertionError("unreachable")


def _problem(response: Any) -> dict[str, Any] | None:
    try:
        document = response.json()
    except ValueError:
        return None
    return document if isinstance(document, dict) else None


def store(cube: Cube, *, database_url: str, experiment: str,
          today: dt.date | None = None) -> Delivered:
    """Write into the service's own database through its ingest path (same validation, same
    upsert, same re-diagnosis and alerts as an HTTP upload)."""
    from ..db.session import Database
    from ..settings import Settings

    database = Database(database_url, pool_size=1, max_overflow=0)
    try:
        return store_into(database, cube, experiment=experiment, today=today,
                          future_days=Settings(database_url=database_url).future_days)
    finally:
        database.dispose()


def store_into(database: Any, cube: Cube, *, experiment: str, future_days: int,
               today: dt.date | None = None) -> Delivered:
    """:func:`store` through an open :class:`service.db.session.Database`."""
    from detectors.data import records_to_frame

    from ..alerting import CORRECTED_DATA, LATER_DATA
    from ..analysis import NO_DATA, refresh_diagnosis
    from ..db.locks import lock_experiment_for_write
    from ..db.models import utcnow
    from ..ingest import ParsedBody, upsert_rows, validate_rows

    with database.sessions() as session:
        locked = lock_experiment_for_write(session, experiment)
        if locked is None:
            raise InputError([Problem("experiment", f"no experiment {experiment!r} in "
                                      "the database")])
        check_arms(cube, locked.arms, experiment)
        rows = cube.with_arms(locked.arms).rows
        columns = validate_rows(ParsedBody(records_to_frame(rows), []), locked,
                                today=today or utcnow().date(), future_days=future_days)
        staged = upsert_rows(session, locked, columns)
        refresh = refresh_diagnosis(session, locked, staged=staged,
                                    cause=CORRECTED_DATA if staged.updated else LATER_DATA)
        session.commit()
        status = refresh.snapshot.status
        return Delivered(len(rows), None if status == NO_DATA else status,
                         {"inserted": staged.inserted, "updated": staged.updated})
