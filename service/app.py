"""The FastAPI application factory: ``uvicorn --factory service.app:create_app``."""

from __future__ import annotations

import gc
import logging
from collections.abc import AsyncIterator
from contextlib import asynccontextmanager
from importlib.metadata import PackageNotFoundError, version
from typing import Any

from anyio import to_thread
from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi
from pydantic import BaseModel
from starlette.concurrency import run_in_threadpool

from .access_log import AccessLogMiddleware
from .catch_up import CatchUpThread
from .cors import add_cors
from .db.session import Database
from .http import BodyLimitMiddleware
from .http_cache import ConditionalGetMiddleware
from .json_guard import StrictJSONMiddleware
from .metrics import install_metrics
from .notify.settings import NotifySettings
from .notify.worker import start_worker
from .pages.router import router as pages_router
from .problems import PROBLEM_MEDIA_TYPE, UnexpectedErrorMiddleware, install_problem_handlers
from .request_budget import RequestBudgetMiddleware
from .revalidation import RevalidationMiddleware
from .routers import (
    alerts,
    campaigns,
    deliveries,
    diagnosis,
    experiments,
    health,
    incidents,
    observations,
    problem_types,
    pulls,
    reweight,
    sensitivity,
    tokens,
)
from .schemas.common import ProblemDetails
from .settings import Settings
from .table_cache import cache_for

logger = logging.getLogger("inrush.service")

DESCRIPTION = """\
Inrush watches the daily flow of units into each arm of an experiment, finds the days and
entry sources that broke the planned sample ratio, keeps alerts, and re-estimates the effect by
entry cohort. Errors are RFC 9457 problem details (`application/problem+json`).
Authenticate with `Authorization: Bearer TOKEN`; scopes are read < write < admin.
"""

ROUTERS = (health.router, experiments.router, observations.router, diagnosis.router,
           reweight.router, campaigns.router, sensitivity.router, incidents.router,
           pulls.router, alerts.router, deliveries.router, tokens.router, problem_types.router,
           pages_router)
# Models referenced from hand-written OpenAPI fragments (bodies parsed by the service itself).
DOCUMENTED_MODELS: list[type[BaseModel]] = [ProblemDetails, *observations.DOCUMENTED_MODELS]
_PROBLEM_CONTENT = {PROBLEM_MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/ProblemDetails"}}}


def package_version() -> str:
    try:
        return version("inrush")
    except PackageNotFoundError:
        return "0.0.0"


_frozen = False


def _freeze_startup_objects() -> None:
    """Keep what a process loads at startup (modules, the app) out of the cyclic collector's
    full passes, which would otherwise re-scan it every time; once per process."""
    global _frozen
    if not _frozen:
        gc.freeze()
        _frozen = True


def create_app(settings: Settings | None = None) -> FastAPI:
    """Build the app; without ``settings`` they are read from ``INRUSH_*`` variables."""
    settings = settings or Settings()
    database = Database(settings.database_url, busy_timeout_ms=settings.sqlite_busy_timeout_ms,
                        pool_size=settings.database_pool_size,
                        max_overflow=settings.database_max_overflow,
                        connect_timeout_s=settings.database_connect_timeout_seconds,
                        statement_timeout_ms=settings.statement_timeout_ms)
    notify_settings = NotifySettings(public_url=settings.public_url)

    @asynccontextmanager
    async def lifespan(_: FastAPI) -> AsyncIterator[None]:
        # Synchronous routes and dependencies run on these threads; as many as the pool has
        # connections, so that requests never open one each (or wait for one).
        to_thread.current_default_thread_limiter().total_tokens = settings.request_threads
        if settings.migrate_on_start:
            await run_in_threadpool(database.migrate)
        # Webhook deliveries (INRUSH_NOTIFY_WORKER=0 leaves them to another process).
        worker = start_worker(database, notify_settings)
        catching_up = CatchUpThread(database, settings.catch_up_seconds)
        catching_up.start()
        scheduler = _start_pulls(database, settings)
        _freeze_startup_objects()
        try:
            yield
        finally:
            await run_in_threadpool(catching_up.stop)
            if worker is not None:
                await run_in_threadpool(worker.stop)
            if scheduler is not None:
                await run_in_threadpool(scheduler.stop)
            if database.async_reads is not None:
                await database.async_reads.close()
            database.dispose()

    # /docs and /redoc pull their assets from public CDNs: off unless INRUSH_API_DOCS=1.
    app = FastAPI(title="Inrush", version=package_version(), description=DESCRIPTION,
                  lifespan=lifespan, docs_url="/docs" if settings.api_docs else None,
                  redoc_url="/redoc" if settings.api_docs else None)
    app.state.settings = settings
    app.state.database = database
    cache_for(database.engine, max_bytes=settings.table_cache_mb * 1024 * 1024)
    install_problem_handlers(app)
    # Innermost: an unexpected error becomes a 500 that every layer above sees and logs, and
    # the connection stays usable.
    app.add_middleware(UnexpectedErrorMiddleware)
    app.add_middleware(ConditionalGetMiddleware)
    app.add_middleware(StrictJSONMiddleware)  # inside the size limit: reads bodies it allows
    app.add_middleware(BodyLimitMiddleware, max_bytes=settings.max_body_bytes,
                       public_url=settings.public_url)
    # Each request's time budget, and whether its client is still there (service.db.session
    # stops its statements otherwise); outside the body limit, whose refusal is raised while
    # the application reads the body, and inside the polls' fast path, which needs neither.
    app.add_middleware(RequestBudgetMiddleware, seconds=settings.request_timeout_seconds)
    app.add_middleware(RevalidationMiddleware)  # 304s for polls, before routing
    install_metrics(app)  # outside the others: times and counts every answer
    add_cors(app)  # preflights and CORS headers on every answer, errors included
    app.add_middleware(AccessLogMiddleware)  # outermost: ids and logs every answer
    for router in ROUTERS:
        app.include_router(router)
    app.openapi = lambda: _openapi(app)  # type: ignore[method-assign]
    return app


def _start_pulls(database: Database, settings: Settings) -> Any:
    """The daily pull scheduler (``INRUSH_PULL_AT``), or ``None`` when it is off."""
    if not settings.pull_at:
        return None
    from .warehouse.schedule import PullScheduler, parse_time_of_day

    return PullScheduler(database, at=parse_time_of_day(settings.pull_at),
                         future_days=settings.future_days).start()


def _openapi(app: FastAPI) -> dict[str, Any]:
    if app.openapi_schema is None:
        schema = get_openapi(title=app.title, version=app.version,
                             description=app.description, routes=app.routes)
        components = schema.setdefault("components", {}).setdefault("schemas", {})
        for model in DOCUMENTED_MODELS:
            model_schema = model.model_json_schema(ref_template="#/components/schemas/{model}")
            components.update(model_schema.pop("$defs", {}))
            components[model.__name__] = model_schema
        # Every error is a problem document, including FastAPI's automatic 422.
        for operation in (op for ops in schema["paths"].values() for op in ops.values()):
            for status, response in operation.get("responses", {}).items():
                if status.isdigit() and int(status) >= 400:
                    response["content"] = _PROBLEM_CONTENT
                    if status == "422":
                        response["description"] = "Invalid input"
        for unused in ("HTTPValidationError", "ValidationError"):
            components.pop(unused, None)
        app.openapi_schema = schema
    return app.openapi_schema
