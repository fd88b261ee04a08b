"""Structured access log and request ids.

:class:`AccessLogMiddleware` gives every request an id -- the caller's ``X-Request-ID`` when it
is a plain token of at most 128 characters, a new random one otherwise -- echoes it in the
``X-Request-ID`` answer header, and writes one record per request to the ``inrush.access``
logger: method, path, route template, status, duration, bytes sent, client, user agent and the
name of the token used (never the token). Query parameters that carry credentials
(``?token=`` of the status pages) are redacted.

:class:`JsonFormatter` renders records as JSON lines; ``inrush serve`` installs it for the
``inrush`` loggers. Every record logged while a request is served carries its ``request_id``.
"""

from __future__ import annotations

import contextvars
import datetime as dt
import json
import logging
import random
import re
import time
from typing import Any
from urllib.parse import parse_qsl, urlencode

from starlette.datastructures import Headers, MutableHeaders
from starlette.types import ASGIApp, Message, Receive, Scope, Send

ACCESS_LOGGER = "inrush.access"
REQUEST_ID_HEADER = "X-Request-ID"
_VALID_REQUEST_ID = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._:@+=/-]{0,127}$")
# Query parameters whose values are credentials and never logged.
_SECRET_PARAMETER = re.compile(r"token|secret|password|key", re.IGNORECASE)
REDACTED = "[redacted]"

request_id_var: contextvars.ContextVar[str | None] = contextvars.ContextVar(
    "inrush_request_id", default=None)


def current_request_id() -> str | None:
    """The id of the request being served in this context, if any."""
    return request_id_var.get()


def accepted_request_id(value: str | None) -> str:
    """The caller's id when it is acceptable, else a fresh one (32 hex digits)."""
    if value is not None and _VALID_REQUEST_ID.match(value):
        return value
    # Unique, not secret: the process's pseudo-random generator, not a system call per request.
    return f"{random.getrandbits(128):032x}"


def redact_query(query: str) -> str:
    """The query string with credential-bearing parameter values replaced."""
    if not query:
        return ""
    pairs = parse_qsl(query, keep_blank_values=True)
    return urlencode([(name, REDACTED if _SECRET_PARAMETER.search(name) else value)
                      for name, value in pairs])


class JsonFormatter(logging.Formatter):
    """One JSON object per line: time (UTC), level, logger, message, request_id, and the
    fields passed as ``extra={"fields": {...}}``; tracebacks under ``exception``."""

    def format(self, record: logging.LogRecord) -> str:
        document: dict[str, Any] = {
            "time": dt.datetime.fromtimestamp(record.created, dt.UTC).isoformat(
                timespec="milliseconds").replace("+00:00", "Z"),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        request_id = getattr(record, "request_id", None) or current_request_id()
        if request_id:
            document["request_id"] = request_id
        fields = getattr(record, "fields", None)
        if isinstance(fields, dict):
            document.update(fields)
        if record.exc_info:
            document["exception"] = self.formatException(record.exc_info)
        return json.dumps(document, ensure_ascii=False, default=str)


class AccessLogMiddleware:
    """Request ids and one access-log record per HTTP request (see the module docstring)."""

    def __init__(self, app: ASGIApp, logger_name: str = ACCESS_LOGGER) -> None:
        self.app = app
        self.logger = logging.getLogger(logger_name)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        headers = Headers(scope=scope)
        request_id = accepted_request_id(headers.get(REQUEST_ID_HEADER))
        state = scope.setdefault("state", {})
        state["request_id"] = request_id
        token = request_id_var.set(request_id)
        started = time.perf_counter()
        status: int | None = None
        sent = 0

        async def send_with_id(message: Message) -> None:
            nonlocal status, sent
            if message["type"] == "http.response.start":
                status = int(message["status"])
                MutableHeaders(scope=message)[REQUEST_ID_HEADER] = request_id
            elif message["type"] == "http.response.body":
                sent += len(message.get("body", b""))
            await send(message)

        try:
            await self.app(scope, receive, send_with_id)
        finally:
            client = scope.get("client")
            route = getattr(scope.get("route"), "path", None)
            fields = {
                "request_id": request_id,
                "method": scope["method"],
                "path": scope["path"],
                "query": redact_query(scope.get("query_string", b"").decode("latin-1")),
                "route": route,
                "status": status if status is not None else 500,
                "duration_ms": round((time.perf_counter() - started) * 1000, 3),
                "bytes": sent,
                "client": client[0] if client else None,
                "user_agent": headers.get("user-agent"),
                "principal": state.get("principal"),
            }
            self.logger.info("%s %s %s", fields["method"], fields["path"], fields["status"],
                             extra={"fields": fields})
            request_id_var.reset(token)
