"""RFC 9457 problem details: the one error format of the API, and the handlers that produce it.

Every problem has ``type`` (an absolute URI under ``/problems/``, which serves its description),
``title``, ``status``, ``detail`` and ``instance``; validation problems add ``errors``, a list of
``{row, field, message}`` (plus ``line`` for CSV bodies).
"""

from __future__ import annotations

import logging
import re
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from sqlalchemy.exc import DBAPIError, DisconnectionError, InterfaceError, OperationalError
from sqlalchemy.exc import TimeoutError as PoolTimeoutError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from detectors.errors import InputError, Problem, UndefinedEstimateError

from .request_budget import RequestAbandonedError

PROBLEM_MEDIA_TYPE = "application/problem+json"
MAX_LISTED_ERRORS = 1000
RETRY_AFTER = "5"  # seconds a client should wait after a 503
logger = logging.getLogger("inrush.service")

# slug -> (title, what it means and what to do); served at /problems/{slug}.
PROBLEM_TYPES: dict[str, tuple[str, str]] = {
    "invalid-input": (
        "Invalid input",
        "The request is well-formed but some values cannot be accepted. `errors` lists each "
        "offending row (0-based position in the request; for CSV also the file `line` it "
        "starts on, the header being line 1), field and reason; nothing was written."),
    "malformed-body": (
        "Malformed request body",
        "The body could not be parsed (invalid JSON or CSV syntax). Nothing was written."),
    "undefined-estimate": (
        "Estimate undefined",
        "A cohort with positive weight has no units in some arm, so the re-weighted mean of "
        "that arm is undefined. Exclude the cohort, change the target or coarsen the cohorts."),
    "not-found": ("Not found", "The resource does not exist."),
    "no-diagnosis": (
        "No diagnosis yet",
        "The experiment has no observations with units yet; upload observations first."),
    "conflict": (
        "Conflict",
        "The request conflicts with the current state of the resource (it already exists, or "
        "the transition is not allowed from its current status)."),
    "unauthorized": (
        "Authentication required",
        "Send `Authorization: Bearer TOKEN` with a valid, unrevoked token."),
    "forbidden": ("Insufficient scope",
                  "The token is valid but its scope does not allow this operation."),
    "content-too-large": (
        "Content too large",
        "The body or the number of rows exceeds the configured limit; split the upload."),
    "unsupported-media-type": (
        "Unsupported media type",
        "Send application/json or, where accepted, text/csv."),
    "not-acceptable": ("Not acceptable", "No representation matches the Accept header."),
    "method-not-allowed": ("Method not allowed", "The resource does not support this method."),
    "service-unavailable": ("Service unavailable", "A dependency (the database) is unreachable."),
    "internal-error": (
        "Internal error",
        "The service failed unexpectedly; nothing was written. The incident is logged."),
    "http-error": ("HTTP error", "See the status code and detail."),
}

_STATUS_TYPES = {400: "malformed-body", 401: "unauthorized", 403: "forbidden", 404: "not-found",
                 405: "method-not-allowed", 406: "not-acceptable", 409: "conflict",
                 413: "content-too-large", 415: "unsupported-media-type",
                 422: "invalid-input", 500: "internal-error", 503: "service-unavailable"}


class ProblemError(Exception):
    """Raise anywhere in a request to answer with a problem document."""

    def __init__(self, status: int, detail: str, *, slug: str | None = None,
                 title: str | None = None, errors: Iterable[Mapping[str, Any]] | None = None,
                 headers: Mapping[str, str] | None = None, **extensions: Any) -> None:
        super().__init__(detail)
        self.status = status
        self.detail = detail
        self.slug = slug or _STATUS_TYPES.get(status, "http-error")
        self.title = title
        self.errors = list(errors) if errors is not None else None
        self.headers = dict(headers or {})
        self.extensions = extensions


def problem_response(request: Request, status: int, detail: str, *, slug: str | None = None,
                     title: str | None = None,
                     errors: list[Mapping[str, Any]] | None = None,
                     headers: Mapping[str, str] | None = None,
                     **extensions: Any) -> JSONResponse:
    slug = slug or _STATUS_TYPES.get(status, "http-error")
    default_title = PROBLEM_TYPES.get(slug, PROBLEM_TYPES["http-error"])[0]
    body: dict[str, Any] = {
        "type": f"{_base_url(request)}/problems/{slug}",
        "title": title or default_title,
        "status": status,
        "detail": detail,
        "instance": request.url.path,
    }
    if errors is not None:
        body["errors_total"] = len(errors)
        body["errors"] = [dict(e) for e in errors[:MAX_LISTED_ERRORS]]
        if len(errors) > MAX_LISTED_ERRORS:
            body["detail"] += f" (the first {MAX_LISTED_ERRORS} of {len(errors)} are listed)"
    body.update(extensions)
    return JSONResponse(body, status_code=status, headers=dict(headers or {}),
                        media_type=PROBLEM_MEDIA_TYPE)


def problems_as_errors(problems: Iterable[Problem], *, csv_lines: bool = False,
                       lines: Sequence[int] | None = None) -> list[dict[str, Any]]:
    """``{row, field, message}`` items; CSV bodies also give the file ``line`` of the row
    (header = line 1): from ``lines`` (the reader's, per row) when given, else row + 2."""
    items: list[dict[str, Any]] = []
    for problem in problems:
        item = problem.as_dict()
        if csv_lines and problem.row is not None:
            item["line"] = (int(lines[problem.row]) if lines is not None
                            and problem.row < len(lines) else problem.row + 2)
        items.append(item)
    return items


def input_error_response(request: Request, error: InputError, *, csv_lines: bool = False,
                         detail: str | None = None, lines: Sequence[int] | None = None
                         ) -> JSONResponse:
    errors = problems_as_errors(error.problems, csv_lines=csv_lines, lines=lines)
    if isinstance(error, UndefinedEstimateError):
        return problem_response(
            request, 422, detail or str(error.problems[0].message), slug="undefined-estimate",
            errors=errors, cohort=error.cohort, arm=error.arm)
    return problem_response(request, 422, detail or invalid_input_detail(errors),
                            errors=errors)


def invalid_input_detail(errors: Sequence[Mapping[str, Any]]) -> str:
    """The ``detail`` of an invalid-input problem: how many problems, in how many rows."""
    rows = {e["row"] for e in errors if e["row"] is not None}
    summary = (f"{len(errors)} problem(s) in {len(rows)} row(s)" if rows
               else f"{len(errors)} problem(s)")
    return f"The input was rejected: {summary}; nothing was written."


def _base_url(request: Request) -> str:
    settings = getattr(request.app.state, "settings", None)
    fallback = str(request.base_url)
    return settings.base_url(fallback) if settings is not None else fallback.rstrip("/")


def _location(loc: tuple[Any, ...]) -> tuple[str, int | None, str]:
    """Split a pydantic error location into (where, row, field path)."""
    where = str(loc[0]) if loc else "body"
    rest = list(loc[1:])
    row = None
    if where == "body" and len(rest) >= 2 and rest[0] == "rows" and isinstance(rest[1], int):
        row = rest[1]
        rest = rest[2:]
    path = ""
    for part in rest:
        path += f"[{part}]" if isinstance(part, int) else (f".{part}" if path else str(part))
    return where, row, path or where


def _validation_handler(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, RequestValidationError)
    raw = list(exc.errors())
    if any(e.get("type") == "json_invalid" for e in raw):
        message = next(str(e.get("ctx", {}).get("error", e.get("msg")))
                       for e in raw if e.get("type") == "json_invalid")
        return problem_response(request, 400, f"The body is not valid JSON: {message}.",
                                slug="malformed-body")
    errors = []
    for error in raw:
        where, row, field = _location(tuple(error.get("loc", ())))
        errors.append({"row": row, "field": field, "message": error.get("msg", "invalid"),
                       "in": where})
    return problem_response(request, 422, "The request does not match the expected schema; "
                            "nothing was written.", errors=errors)


def _http_handler(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, StarletteHTTPException)
    detail = exc.detail if isinstance(exc.detail, str) else "HTTP error"
    if exc.status_code == 404 and detail == "Not Found":
        detail = f"No resource at {request.url.path}."
    elif exc.status_code == 405:
        detail = f"{request.method} is not allowed on {request.url.path}."
        # RFC 9110 15.5.6: Allow lists every method of the resource, not only those of the
        # first route whose path matched.
        methods = {m.strip() for m in (exc.headers or {}).get("Allow", "").split(",")
                   if m.strip()} | allowed_methods(request.app, request.url.path)
        return problem_response(request, 405, detail, headers={
            **(exc.headers or {}), "Allow": ", ".join(sorted(methods))})
    return problem_response(request, exc.status_code, detail, headers=exc.headers)


def allowed_methods(app: FastAPI, path: str) -> set[str]:
    """The methods the OpenAPI document lists for ``path`` (HEAD wherever GET is)."""
    methods: set[str] = set()
    for template, operations in app.openapi().get("paths", {}).items():
        pattern = "^" + re.sub(r"\\\{[^}]+\\\}", "[^/]+", re.escape(template)) + "$"
        if re.match(pattern, path):
            methods.update(m.upper() for m in operations if m.isalpha())
    if "GET" in methods:
        methods.add("HEAD")
    return methods


def _problem_handler(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, ProblemError)
    return problem_response(request, exc.status, exc.detail, slug=exc.slug, title=exc.title,
                            errors=exc.errors, headers=exc.headers, **exc.extensions)


def _input_handler(request: Request, exc: Exception) -> JSONResponse:
    assert isinstance(exc, InputError)
    return input_error_response(request, exc)


# PostgreSQL SQLSTATEs after which the same request may well succeed: connection exception
# (08), insufficient resources (53: too many connections, disk full), operator intervention
# (57: a statement timeout, a server shutting down or starting), and serialisation failures,
# deadlocks and lock timeouts. Anything else (a limit exceeded, a bad statement) fails again.
_TRANSIENT_SQLSTATE_CLASSES = ("08", "53", "57")
_TRANSIENT_SQLSTATES = frozenset({"40001", "40P01", "55P03"})
# SQLite primary result codes of the same kind: locked past the busy timeout, interrupted (the
# statement timeout), the file unreadable, unopenable or full.
_TRANSIENT_SQLITE_CODES = frozenset({5, 6, 9, 10, 13, 14, 15})


def database_unavailable(exc: BaseException) -> bool:
    """Whether ``exc`` says the database cannot be used right now, so that retrying later may
    succeed (answered 503 with ``Retry-After``): unreachable, refusing connections, locked or
    busy past a timeout, a dropped connection, no pooled connection free in time. An error
    the same request would meet again (too many columns, a limit, a bug) is not."""
    if isinstance(exc, DisconnectionError | PoolTimeoutError | InterfaceError):
        return True
    if not isinstance(exc, DBAPIError):
        return False
    if exc.connection_invalidated:
        return True
    cause = exc.orig
    sqlstate = getattr(cause, "sqlstate", None)  # psycopg
    if isinstance(sqlstate, str):
        return sqlstate[:2] in _TRANSIENT_SQLSTATE_CLASSES or sqlstate in _TRANSIENT_SQLSTATES
    code = getattr(cause, "sqlite_errorcode", None)  # sqlite3
    if isinstance(code, int):
        return code & 0xFF in _TRANSIENT_SQLITE_CODES
    # No code: the driver's own failure to reach the server (psycopg's connection errors).
    return isinstance(exc, OperationalError)


def _database_handler(request: Request, exc: Exception) -> JSONResponse:
    if not database_unavailable(exc):
        return _unexpected_handler(request, exc)
    # The request did nothing and can be retried. Only the driver's message is logged: the
    # statement is noise and its parameters may hold secrets (the engine hides them anyway).
    cause = getattr(exc, "orig", None) or exc
    logger.error("database unavailable on %s %s: %s: %s", request.method, request.url.path,
                 type(cause).__name__, str(cause).strip().splitlines()[0] if str(cause) else "")
    return problem_response(request, 503, "The database is unavailable or busy; nothing was "
                            "written. Retry shortly.", headers={"Retry-After": RETRY_AFTER})


def _abandoned_handler(request: Request, exc: Exception) -> JSONResponse:
    # The client may be gone (then nobody reads this), or the request ran past its budget.
    logger.warning("request stopped on %s %s: %s", request.method, request.url.path, exc)
    return problem_response(request, 503, f"The request was stopped: {exc}; nothing was "
                            "written. Retry shortly.", headers={"Retry-After": RETRY_AFTER})


def _unexpected_handler(request: Request, exc: Exception) -> JSONResponse:
    logger.exception("unhandled error on %s %s", request.method, request.url.path,
                     exc_info=exc)
    return problem_response(request, 500, "The service failed unexpectedly; nothing was "
                            "written. The error has been logged.")


class UnexpectedErrorMiddleware:
    """Answers an exception that no handler took with the 500 problem document, instead of
    letting it reach the server: Starlette's outermost layer re-raises it after answering, and
    uvicorn then drops the connection, so the client's next request on that keep-alive
    connection met a reset. When a response had started already, only closing the connection
    can end it, and the exception goes on to the server."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = False

        async def tracking_send(message: Message) -> None:
            nonlocal started
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, receive, tracking_send)
        except Exception as exc:
            if started:
                raise
            request = Request(scope)
            response = (_abandoned_handler(request, exc)
                        if isinstance(exc, RequestAbandonedError)
                        else _database_handler(request, exc) if database_unavailable(exc)
                        else _unexpected_handler(request, exc))
            await response(scope, receive, send)


def install_problem_handlers(app: FastAPI) -> None:
    app.add_exception_handler(RequestValidationError, _validation_handler)
    app.add_exception_handler(StarletteHTTPException, _http_handler)
    app.add_exception_handler(ProblemError, _problem_handler)
    app.add_exception_handler(InputError, _input_handler)
    app.add_exception_handler(RequestAbandonedError, _abandoned_handler)
    for unavailable in (DBAPIError, DisconnectionError, PoolTimeoutError):
        app.add_exception_handler(unavailable, _database_handler)
    app.add_exception_handler(Exception, _unexpected_handler)
