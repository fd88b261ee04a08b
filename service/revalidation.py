"""Cheap revalidation for polling dashboards: 304 before routing when the tag is current.

Dashboards poll ``GET /v1/experiments/{id}/diagnosis`` and ``.../series`` with the entity tag
they hold, and nearly every answer is 304 Not Modified. :class:`RevalidationMiddleware` answers
those from one indexed query of the latest snapshot's tag (session, bearer token, tag),
without routing, dependency resolution or loading a document: on a SQLite file directly on
the event loop, through a connection that never waits for a lock; on PostgreSQL in one
worker-thread call, through connections that are not pinged (``Database.quick_reads``).

It only ever answers 304, and only when everything checks out: a bearer token with at least
read scope, no query string, and an ``If-None-Match`` that matches the latest tag. Anything
else (no or unknown token, an earlier ``version``, an unknown experiment, a changed tag) goes
on to the routes, which answer it in full, errors included. The answer carries the headers
the route's 304 would (``ETag``, ``Cache-Control``, ``X-Inrush-Diagnosis-Version``), and the
access log and metrics see the route's template as for any routed request.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Any

from anyio import CapacityLimiter, to_thread
from sqlalchemy import Select, bindparam, select
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.orm import Session
from starlette.datastructures import Headers
from starlette.routing import BaseRoute
from starlette.types import ASGIApp, Receive, Scope, Send

from .db.models import DiagnosisSnapshot
from .db.session import QUICK_READ_CONNECTIONS, Database
from .http import etag_matches
from .http_cache import REVALIDATE
from .routers import diagnosis as diagnosis_routes
from .settings import Settings
from .tokens import Scope as TokenScope
from .tokens import authenticate

_PATH = re.compile(r"/v1/experiments/(?P<experiment>[^/]+)/(?P<document>diagnosis|series)")
_TEMPLATES = {"diagnosis": "/v1/experiments/{experiment_id}/diagnosis",
              "series": "/v1/experiments/{experiment_id}/series"}


def _latest_tag(tag_column: Any) -> Select[tuple[int, str]]:
    return (select(DiagnosisSnapshot.version, tag_column)
            .where(DiagnosisSnapshot.experiment_id == bindparam("experiment_id"))
            .order_by(DiagnosisSnapshot.version.desc()).limit(1))


# Built once: polls run them many times a second.
_LATEST_TAG = {"diagnosis": _latest_tag(DiagnosisSnapshot.etag),
               "series": _latest_tag(DiagnosisSnapshot.series_etag)}


@dataclass(frozen=True)
class _Current:
    etag: str
    version: int
    principal: str


def current_tag(database: Database, settings: Settings, authorization: str,
                experiment_id: str, document: str, if_none_match: str) -> _Current | None:
    """The latest tag of ``document`` when the token may read it and ``If-None-Match`` holds
    it; ``None`` in every other case (the route then answers)."""
    scheme, _, token = authorization.partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        return None
    admin = settings.admin_token.get_secret_value() if settings.admin_token else None
    try:
        # Two single-row reads need no transaction: autocommit saves the BEGIN and ROLLBACK.
        with database.quick_reads.connect().execution_options(
                isolation_level="AUTOCOMMIT") as connection, Session(bind=connection) as session:
            principal = authenticate(session, token.strip(), admin)
            if principal is None or principal.scope < TokenScope.read:
                return None
            row = connection.execute(_LATEST_TAG[document],
                                     {"experiment_id": experiment_id}).first()
    except SQLAlchemyError:
        # A connection the server closed (these are not pinged), an outage: the routes
        # answer, with their own connections and error handling.
        return None
    if row is None or row[1] is None or not etag_matches(if_none_match, row[1]):
        return None
    return _Current(row[1], row[0], principal.name)


class RevalidationMiddleware:
    """Answers current conditional GETs of a diagnosis or series with 304 (module docstring).

    Install it inside the access log, metrics and CORS middleware, so that its answers are
    logged, counted and given CORS headers like every other.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app
        # As many threads as the quick-read engine has connections: none waits for one.
        self.limiter = CapacityLimiter(QUICK_READ_CONNECTIONS)
        # The routes whose answers these stand for: the access log and metrics label by them.
        self.routes: dict[str, BaseRoute] = {
            document: route for route in diagnosis_routes.router.routes
            for document, path in _TEMPLATES.items()
            if getattr(route, "path", None) == path
            and "GET" in (getattr(route, "methods", None) or ())}

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        match = (_PATH.fullmatch(scope["path"])
                 if scope["type"] == "http" and scope["method"] == "GET"
                 and not scope.get("query_string") else None)
        if match is None:
            await self.app(scope, receive, send)
            return
        headers = Headers(scope=scope)
        if_none_match = headers.get("if-none-match")
        authorization = headers.get("authorization")
        if not if_none_match or not authorization:
            await self.app(scope, receive, send)
            return
        app = scope["app"]
        document = match["document"]
        database: Database = app.state.database
        arguments = (database, app.state.settings, authorization, match["experiment"],
                     document, if_none_match)
        if database.quick_reads_inline:  # never waits (see Database): no thread hand-off
            current = current_tag(*arguments)
        else:
            current = await to_thread.run_sync(current_tag, *arguments, limiter=self.limiter)
        if current is None:
            await self.app(scope, receive, send)
            return
        scope.setdefault("state", {})["principal"] = current.principal
        if document in self.routes:
            scope["route"] = self.routes[document]
        await send({"type": "http.response.start", "status": 304, "headers": [
            (b"etag", current.etag.encode("latin-1")),
            (b"cache-control", REVALIDATE.encode("latin-1")),
            (b"x-inrush-diagnosis-version", str(current.version).encode("latin-1"))]})
        await send({"type": "http.response.body", "body": b""})
