"""/healthz: liveness and database reachability, answered within a bounded time."""

from __future__ import annotations

import anyio
from anyio import to_thread
from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from pydantic import BaseModel
from sqlalchemy.exc import SQLAlchemyError

from ..db.session import Database
from ..problems import RETRY_AFTER, logger, problem_response
from ..schemas.common import problem_responses
from ..settings import Settings

router = APIRouter(tags=["health"])
PROBE_THREADS = 4  # concurrent checks (load balancers, orchestrators) that may wait at once


class Health(BaseModel):
    status: str
    database: str


@router.get("/healthz", response_model=Health, responses=problem_responses(503))
async def healthz(request: Request) -> JSONResponse:
    """200 when the service can reach its database, 503 (problem details) when it cannot, or
    not within ``INRUSH_HEALTH_TIMEOUT_SECONDS`` (2 s by default)."""
    database: Database = request.app.state.database
    settings: Settings = request.app.state.settings
    # Checks run on a few threads of their own: while a database that does not answer holds
    # them all (until the connect or statement timeout frees them), checks answer 503 at once
    # instead of piling up on the request threads.
    probe: anyio.CapacityLimiter | None = getattr(request.app.state, "health_probe", None)
    if probe is None:
        probe = request.app.state.health_probe = anyio.CapacityLimiter(PROBE_THREADS)
    problem: str | None = None
    if probe.available_tokens < 1:
        problem = "earlier checks are still waiting for the database"
    else:
        try:
            with anyio.fail_after(settings.health_timeout_seconds):
                await to_thread.run_sync(database.ping, limiter=probe, abandon_on_cancel=True)
        except TimeoutError:
            problem = f"no answer within {settings.health_timeout_seconds:g} s"
        except (SQLAlchemyError, OSError) as error:
            problem = str(error).strip().splitlines()[0] if str(error).strip() else "error"
    if problem is not None:
        logger.warning("health check: database unreachable: %s", problem)
        return problem_response(request, 503, "The database cannot be reached.",
                                headers={"Retry-After": RETRY_AFTER}, database="unreachable")
    return JSONResponse({"status": "ok", "database": "ok"})
