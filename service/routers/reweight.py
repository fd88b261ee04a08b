"""/v1/experiments/{id}/reweight: naive and cohort re-weighted effect estimates."""

from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np
from fastapi import APIRouter, Depends
from fastapi.responses import JSONResponse
from sqlalchemy.orm import Session

from detectors import InputError, ObservationTable, reweight
from detectors.allocation import AllocationSchedule
from detectors.contamination import ContaminatedCell, cells_from_document
from detectors.honest import UNCONTAMINATED, attach_bounds, honest_effect
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
        document = default_effect(table, schedule, body.metric, cells,
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
    kept = _without(table, body.exclude_sources, body.exclude_dates)
    return attach_bounds(result, kept, cells, schedule)


def default_effect(table: ObservationTable, schedule: AllocationSchedule, metric: str,
                   cells: tuple[ContaminatedCell, ...], *, incidents: int = 0
                   ) -> dict[str, Any]:
    """The honest estimate the service chooses without options, and why (``default``).

    When no source has clean units in every arm (an imbalance on every day), the estimate falls
    back to every cell, said so in ``reason``; the bounds still trim the contaminated cells.
    """
    cell_keys = {(c.date, c.source) for c in cells}
    if cells:
        what = (f"{incidents} incident(s)" if incidents else "alert-level flagged days")
        reason = (f"The latest diagnosis has {what} touching {len(cell_keys)} (day, source) "
                  "cell(s). Re-weighting cohorts an inflow created cannot remove its selection, "
                  "so the default leaves those cells out in every arm and weights entry sources "
                  "(within allocation periods) by the regular population: every unit less the "
                  "incidents' excess.")
    else:
        reason = ("The latest diagnosis marks no cell as contaminated, so the default "
                  "post-stratifies by entry source (within allocation periods) to the pooled "
                  "mix of every unit.")
    excluded = cells
    try:
        result = honest_effect(table, metric, cells, schedule)
    except InputError:
        if not cells:
            raise
        result = attach_bounds(honest_effect(table, metric, (), schedule), table, cells,
                               schedule)
        excluded = ()
        reason += (" No entry source has clean units in every arm, so the estimate below "
                   "uses every cell, contaminated ones included, and can be biased; the bounds "
                   "are the honest answer.")
    document = result.to_dict()
    document["default"] = {
        "target": result.target, "by": list(result.by),
        "excluded_cells": [{"date": c.date.isoformat(), "source": c.source, "arm": c.arm,
                            "units": round(c.units, 1)} for c in excluded],
        "reason": reason}
    return document


def _without(table: ObservationTable, sources: list[str], dates: list[dt.date]
             ) -> ObservationTable:
    """The table less excluded sources and days (already validated by ``reweight``)."""
    if not sources and not dates:
        return table
    keep = [s for s in table.sources if s not in set(sources)]
    day_mask = ~np.isin(table.dates, np.array(dates, dtype="datetime64[D]"))
    return table.select(sources=keep, day_mask=day_mask)


def flagged_dates(document: dict[str, Any]) -> list[dt.date]:
    """Alert-level flagged days of a diagnosis document (the inflow window)."""
    return [dt.date.fromisoformat(day["date"]) for day in document.get("flagged_days", [])
            if day.get("severity") == "alert"]
