"""/v1/experiments/{id}/reweight: naive and cohort re-weighted effect estimates."""

from __future__ import annotations

import datetime as dt
from typing import Any

from fastapi import APIRouter, Depends
from fastapi.responses import JSONResponse
from sqlalchemy.orm import Session

from detectors import ObservationTable, reweight
from detectors.allocation import AllocationSchedule
from detectors.contamination import ContaminatedCell, cells_from_document
from detectors.honest import UNCONTAMINATED, attach_bounds, default_effect, honest_effect
from detectors.reweight import Reweighting

from ..analysis import latest_snapshot, load_table, schedule_for
from ..auth import require_read
from ..db.session import get_session
from ..http import json_safe
from ..problems import ProblemError
from ..schemas.common import problem_responses
from ..schemas.reweight import ReweightRequest, ReweightResponse
from ..tokens import Principal
from .common import get_experiment

router = APIRouter(prefix="/v1/experiments/{experiment_id}", tags=["reweight"])


@router.post("/reweight", response_model=ReweightResponse,
             responses=problem_responses(400, 401, 403, 404, 422))
def reweight_effect(experiment_id: str, body: ReweightRequest,
                    session: Session = Depends(get_session),
                    _: Principal = Depends(require_read)) -> JSONResponse:
    """Naive, re-weighted and honest effect estimates with trimming bounds.

    With only ``metric`` the service chooses the honest estimate (``target: uncontaminated``):
    the latest diagnosis's contaminated cells (its incidents' cells, or its alert-level flagged
    days and their sources) are left out in every arm, and entry sources within allocation
    periods are weighted by the regular population; ``default`` says which target, cohorts and
    cells it used and why. Explicit options re-weight as asked (the flagged window is the
    alert-level days of the latest diagnosis). Every comparison carries ``bounds`` and
    ``relative_bounds``: Lee (2009) trimming bounds of the contaminated cells with an
    Imbens-Manski (2004) interval. With an explicit target, a cohort with positive weight and
    no units in some arm makes the estimate undefined: 422 naming the cohort. The answer's
    ``caveats`` say what each estimate assumes.
    """
    experiment = get_experiment(session, experiment_id)
    table = load_table(session, experiment)
    snapshot = latest_snapshot(session, experiment_id)
    if table is None or snapshot is None or snapshot.document is None:
        raise ProblemError(404, f"Experiment {experiment_id!r} has no observations with units "
                           "yet: nothing to re-weight.", slug="no-diagnosis")
    if body.metric not in table.metrics:
        known = ", ".join(sorted(table.metrics)) or "none"
        raise ProblemError(422, f"The experiment has no metric {body.metric!r} (metrics: "
                           f"{known}).", errors=[{"row": None, "field": "metric",
                                                  "message": f"unknown metric; known: {known}"}])
    cells = cells_from_document(snapshot.document)
    schedule = schedule_for(experiment)
    if body.is_default:
        document = default_effect(table, body.metric, cells, schedule,
                                  incidents=len(snapshot.document.get("incidents") or ()))
    else:
        document = explicit_effect(table, schedule, body, cells,
                                   flagged_dates(snapshot.document)).to_dict()
        document["default"] = None
    return JSONResponse(json_safe(document))


def explicit_effect(table: ObservationTable, schedule: AllocationSchedule,
                    body: ReweightRequest, cells: tuple[ContaminatedCell, ...],
                    flagged: list[dt.date]) -> Reweighting:
    """The estimate the request asked for, with the contaminated cells' bounds attached."""
    if body.target == UNCONTAMINATED:
        return honest_effect(table, body.metric, cells, schedule)
    result = reweight(table, body.metric, target=body.target, weights=body.weights,
                      by=tuple(body.by), exclude_sources=body.exclude_sources,
                      exclude_dates=body.exclude_dates, flagged_dates=flagged)
    return attach_bounds(result, table, cells, schedule, exclude_sources=body.exclude_sources,
                         exclude_dates=body.exclude_dates)


def flagged_dates(document: dict[str, Any]) -> list[dt.date]:
    """Alert-level flagged days of a diagnosis document (the inflow window)."""
    return [dt.date.fromisoformat(day["date"]) for day in document.get("flagged_days", [])
            if day.get("severity") == "alert"]
