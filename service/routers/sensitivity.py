"""/v1/experiments/{id}/sensitivity: the smallest inflow the diagnosis would catch."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Depends, Query
from fastapi.responses import JSONResponse
from sqlalchemy.orm import Session

from ..analysis import latest_snapshot
from ..auth import require_read
from ..db.session import get_session
from ..problems import ProblemError
from ..schemas.common import problem_responses
from ..schemas.sensitivity import SensitivityOut
from ..tokens import Principal
from ..traffic import (
    DEFAULT_SENSITIVITY_DAYS,
    sensitivity_document,
    stored_arm_traffic,
    thresholds_of,
)
from .common import get_experiment

router = APIRouter(prefix="/v1/experiments/{experiment_id}", tags=["sensitivity"])


@router.get("/sensitivity", response_model=SensitivityOut,
            responses=problem_responses(401, 403, 404, 422))
def get_sensitivity(experiment_id: str, session: Session = Depends(get_session),
                    _: Principal = Depends(require_read),
                    days: Annotated[int, Query(
                        ge=1, le=31, description="length of the inflow in days")
                    ] = DEFAULT_SENSITIVITY_DAYS) -> JSONResponse:
    """How large an inflow into one arm, held for `days` days, the diagnosis flags with 80%
    probability, per arm (`units_per_day`, `share_of_arm_traffic`), and the smallest share
    shift the whole-period test catches. Computed from the experiment's own recent traffic and
    the alert level and longest scanned window of its diagnosis. Smaller inflows can still bias
    the effect estimate unnoticed (`caveats`). 404 (`no-diagnosis`) before any unit entered.
    """
    experiment = get_experiment(session, experiment_id)
    traffic = stored_arm_traffic(session, experiment)
    if traffic is None:
        raise ProblemError(404, f"Experiment {experiment_id!r} has no observations with units "
                           "yet: there is no traffic to measure sensitivity from.",
                           slug="no-diagnosis")
    snapshot = latest_snapshot(session, experiment_id)
    alpha, max_window = thresholds_of(snapshot.document if snapshot else None)
    return JSONResponse(sensitivity_document(traffic, days=days, alpha=alpha,
                                             max_window=max_window))
