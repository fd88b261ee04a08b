"""Cheap revalidation for polling dashboards: 304 before routing when the tag is current.

Dashboards poll ``GET /v1/experiments/{id}/diagnosis`` and ``.../series`` with the entity tag
they hold, and nearly every answer is 304 Not Modified. :class:`RevalidationMiddleware` answers
those from the bearer token and one indexed query of the latest snapshot's tag, on the event
loop itself (a hand-off to a worker thread would cost more than the read), without routing,
dependency resolution or loading a document: on PostgreSQL in one awaited round trip through
connections of its own (``Database.async_reads``), on a SQLite file through a connection that
never waits for a lock (``Database.quick_reads``). A read that fails leaves the request to the
routes; with SQLite in memory every request is routed.

It only ever answers 304, and only when everything checks out: a bearer token with at least
read scope, no query string, and an ``If-None-Match`` that matches the latest tag. Anything
else (no or unknown token, an earlier ``version``, an unknown experiment, a changed tag) goes
on to the routes, which answer it in full, errors included. The answer carries the headers
the route's 304 would (``ETag``, ``Cache-Control``, ``X-Inrush-Diagnosis-Version``), and the
access log and metrics see the route's template as for any routed request.
"""

from __future__ import annotations

import datetime as dt
import re
from dataclasses import dataclass
from typing import Any

from sqlalchemy import Engine, Select, bindparam, func, select
from sqlalchemy.exc import SQLAlchemyError
from starlette.datastructures import Headers
from starlette.routing import BaseRoute
from starlette.types import ASGIApp, Receive, Scope, Send

from .db.async_reads import QuickReadError
from .db.models import ApiToken, DiagnosisSnapshot
from .db.session import Database
from .http import etag_matches
from .http_cache import REVALIDATE
from .routers import diagnosis as diagnosis_routes
from .settings import Settings
from .tokens import Principal, bootstrap_principal, hash_token, stored_principal
from .tokens import Scope as TokenScope

_PATH = re.compile(r"/v1/experiments/(?P<experiment>[^/]+)/(?P<document>diagnosis|series)")
_TEMPLATES = {"diagnosis": "/v1/experiments/{experiment_id}/diagnosis",
              "series": "/v1/experiments/{experiment_id}/series"}


def _latest_tag(tag_column: Any) -> Select[tuple[int, str]]:
    return (select(DiagnosisSnapshot.version, tag_column)
            .where(DiagnosisSnapshot.experiment_id == bindparam("experiment_id"))
            .order_by(DiagnosisSnapshot.version.desc()).limit(1))


# Built once: polls run them many times a second. The diagnosis is served under the tag that
# covers its incidents' lifecycle fields when it has any (service.incidents.served_document).
_LATEST_TAG = {"diagnosis": _latest_tag(func.coalesce(DiagnosisSnapshot.served_etag,
                                                      DiagnosisSnapshot.etag)),
               "series": _latest_tag(DiagnosisSnapshot.series_etag)}
# PostgreSQL: the latest tag and the presented token's row in one round trip.
_TAG_AND_TOKEN = {document: (
    f"SELECT latest.version, latest.tag, token.id, token.name, token.scope, token.token_hash, "
    f"token.revoked_at FROM (SELECT 1) AS one "
    f"LEFT JOIN LATERAL (SELECT version, {column} AS tag FROM {DiagnosisSnapshot.__tablename__}"
    f" WHERE experiment_id = %(experiment_id)s ORDER BY version DESC LIMIT 1) AS latest ON true "
    f"LEFT JOIN {ApiToken.__tablename__} AS token ON token.token_hash = %(digest)s")
    for document, column in (("diagnosis", "COALESCE(served_etag, etag)"),
                             ("series", "series_etag"))}


@dataclass(frozen=True)
class _Current:
    etag: str
    version: int
    principal: str


@dataclass(frozen=True)
class _TokenRow:
    id: int
    name: str
    scope: str
    token_hash: str
    revoked_at: dt.datetime | None


def _bearer_digest(authorization: str) -> str | None:
    scheme, _, token = authorization.partition(" ")
    if scheme.lower() != "bearer" or not token.strip():
        return None
    return hash_token(token.strip())


def _decide(principal: Principal | None, tag_row: tuple[Any, Any] | None,
            if_none_match: str) -> _Current | None:
    if principal is None or principal.scope < TokenScope.read:
        return None
    if tag_row is None or tag_row[1] is None or not etag_matches(if_none_match, tag_row[1]):
        return None
    return _Current(tag_row[1], tag_row[0], principal.name)


async def current_tag(database: Database, settings: Settings, authorization: str,
                      experiment_id: str, document: str, if_none_match: str) -> _Current | None:
    """The latest tag of ``document`` when the token may read it and ``If-None-Match`` holds
    it; ``None`` in every other case, a failed read included (the route then answers)."""
    digest = _bearer_digest(authorization)
    if digest is None:
        return None
    admin = settings.admin_token.get_secret_value() if settings.admin_token else None
    if database.async_reads is not None:
        try:
            row = await database.async_reads.fetch_one(
                _TAG_AND_TOKEN[document], {"experiment_id": experiment_id, "digest": digest})
        except QuickReadError:
            return None
        if row is None:
            return None
        stored = _TokenRow(*row[2:]) if row[2] is not None else None
        principal = bootstrap_principal(digest, admin) or stored_principal(stored, digest)
        return _decide(principal, (row[0], row[1]), if_none_match)
    if database.quick_reads is not None:
        return _current_tag_sqlite(database.quick_reads, admin, digest, experiment_id,
                                   document, if_none_match)
    return None


def _current_tag_sqlite(engine: Engine, admin: str | None, digest: str, experiment_id: str,
                        document: str, if_none_match: str) -> _Current | None:
    try:
        # Two single-row reads need no transaction: autocommit saves the BEGIN and ROLLBACK.
        with engine.connect().execution_options(isolation_level="AUTOCOMMIT") as connection:
            principal = bootstrap_principal(digest, admin) or stored_principal(
                connection.execute(select(ApiToken).where(ApiToken.token_hash == digest))
                .first(), digest)
            if principal is None:
                return None
            row = connection.execute(_LATEST_TAG[document],
                                     {"experiment_id": experiment_id}).first()
    except SQLAlchemyError:
        # The file is held by a checkpoint or recovery (this connection never waits).
        return None
    return _decide(principal, None if row is None else (row[0], row[1]), if_none_match)


class RevalidationMiddleware:
    """Answers current conditional GETs of a diagnosis or series with 304 (module docstring).

    Install it inside the access log, metrics and CORS middleware, so that its answers are
    logged, counted and given CORS headers like every other.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app
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
        current = await current_tag(app.state.database, app.state.settings, authorization,
                                    match["experiment"], document, if_none_match)
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
