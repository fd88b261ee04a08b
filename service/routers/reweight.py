"""/v1/experiments/{id}/reweight: naive and cohort re-weighted effect estimates."""

from __future__ import annotations

import datetime as dt
from typing import Any

from fastapi import APIRouter, Depends
from fastapi.responses import JSONResponse
from sqlalchemy.orm import Session

from detectors import reweight

from ..analysis import latest_snapshot, load_table
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
    """Post-stratify a metric over entry cohorts (by source, or source x flagged window).

    The flagged window is the alert-level days of the latest diagnosis. A cohort with positive
    weight and no units in some arm makes the estimate undefined: 422 naming the cohort.
    A re-weighted estimate answers a different question than the randomised comparison; the
    answer's ``caveats`` say so.
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
    result = reweight(table, body.metric, target=body.target, weights=body.weights,
                      by=tuple(body.by), exclude_sources=body.exclude_sources,
                      exclude_dates=body.exclude_dates,
                      flagged_dates=flagged_dates(snapshot.document))
    return JSONResponse(json_safe(result.to_dict()))


def flagged_dates(document: dict[str, Any]) -> list[dt.date]:
    """Alert-level flagged days of a diagnosis document (the inflow window)."""
    return [dt.date.fromisoformat(day["date"]) for day in document.get("flagged_days", [])
            if day.get("severity") == "alert"]
