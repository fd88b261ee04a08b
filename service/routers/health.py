"""/healthz: liveness and database reachability."""

from __future__ import annotations

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from pydantic import BaseModel
from sqlalchemy.exc import SQLAlchemyError

from ..db.session import Database
from ..problems import RETRY_AFTER, logger, problem_response
from ..schemas.common import problem_responses

router = APIRouter(tags=["health"])


class Health(BaseModel):
    status: str
    database: str


@router.get("/healthz", response_model=Health, responses=problem_responses(503))
def healthz(request: Request) -> JSONResponse:
    """200 when the service can reach its database, 503 (problem details) when it cannot."""
    database: Database = request.app.state.database
    try:
        database.ping()
    except (SQLAlchemyError, OSError) as error:
        logger.warning("health check: database unreachable: %s", error)
        return problem_response(request, 503, "The database cannot be reached.",
                                headers={"Retry-After": RETRY_AFTER}, database="unreachable")
    return JSONResponse({"status": "ok", "database": "ok"})
