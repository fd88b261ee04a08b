"""HTTP plumbing shared by the routers: entity tags, content negotiation, body size limits."""

from __future__ import annotations

import hashlib
from typing import Any

from starlette.datastructures import Headers
from starlette.exceptions import HTTPException
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from .jsonsafe import canonical_json as canonical_json  # re-exported for the routers
from .jsonsafe import json_safe as json_safe
from .problems import PROBLEM_MEDIA_TYPE, PROBLEM_TYPES

CSV_MEDIA_TYPE = "text/csv"
JSON_MEDIA_TYPE = "application/json"


def entity_tag(document: Any) -> str:
    """A strong entity tag (quoted) for a JSON document."""
    return '"' + hashlib.sha256(canonical_json(document)).hexdigest()[:32] + '"'


def etag_matches(if_none_match: str | None, etag: str) -> bool:
    """RFC 9110 If-None-Match evaluation (weak comparison)."""
    if not if_none_match:
        return False
    if if_none_match.strip() == "*":
        return True
    wanted = etag.removeprefix("W/")
    return any(tag.strip().removeprefix("W/") == wanted for tag in if_none_match.split(","))


def media_type(content_type: str | None) -> str:
    return (content_type or "").split(";", 1)[0].strip().lower()


def preferred_media_type(accept: str | None, offered: list[str]) -> str | None:
    """The offered type the Accept header prefers; ties go to the earlier offer.

    Each offer takes the quality of the most specific media range matching it (RFC 9110
    section 12.5.1); ``None`` when nothing offered is acceptable.
    """
    if not accept or not accept.strip():
        return offered[0]
    ranges: list[tuple[str, float]] = []
    for part in accept.split(","):
        pieces = [p.strip() for p in part.split(";")]
        quality = 1.0
        for parameter in pieces[1:]:
            name, _, value = parameter.partition("=")
            if name.strip().lower() == "q":
                try:
                    quality = float(value)
                except ValueError:
                    quality = 0.0
        ranges.append((pieces[0].lower(), quality))
    best, best_quality = None, 0.0
    for candidate in offered:
        main = candidate.split("/")[0]
        specificity, quality = -1, 0.0
        for kind, value in ranges:
            rank = (2 if kind == candidate else 1 if kind == f"{main}/*"
                    else 0 if kind == "*/*" else -1)
            if rank > specificity:
                specificity, quality = rank, value
        if quality > best_quality:
            best, best_quality = candidate, quality
    return best


class BodyTooLargeError(HTTPException):
    def __init__(self, limit: int) -> None:
        super().__init__(413, f"The request body exceeds the limit of {limit} bytes; split the "
                              "upload into smaller requests.")


class BodyLimitMiddleware:
    """Refuses bodies over ``max_bytes``: by Content-Length up front, or while streaming."""

    def __init__(self, app: ASGIApp, max_bytes: int, public_url: str | None = None) -> None:
        self.app = app
        self.max_bytes = max_bytes
        self.public_url = public_url

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = Headers(scope=scope).get("content-length")
        if declared is not None and declared.isdigit() and int(declared) > self.max_bytes:
            await self._refuse(scope, send)
            return
        received = 0

        async def limited_receive() -> Message:
            nonlocal received
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > self.max_bytes:
                    raise BodyTooLargeError(self.max_bytes)
            return message

        await self.app(scope, limited_receive, send)

    async def _refuse(self, scope: Scope, send: Send) -> None:
        # The app (and its exception handlers) never sees this request, so answer here.
        from starlette.requests import Request

        request = Request(scope)
        base = (self.public_url or str(request.base_url)).rstrip("/")
        body = canonical_json({
            "type": f"{base}/problems/content-too-large",
            "title": PROBLEM_TYPES["content-too-large"][0], "status": 413,
            "detail": f"The request body exceeds the limit of {self.max_bytes} bytes; split the "
                      "upload into smaller requests.",
            "instance": request.url.path})
        await send({"type": "http.response.start", "status": 413, "headers": [
            (b"content-type", PROBLEM_MEDIA_TYPE.encode()),
            (b"content-length", str(len(body)).encode()), (b"connection", b"close")]})
        await send({"type": "http.response.body", "body": body})
