"""Conditional GET for pollers: strong ETags from a content hash, ``If-None-Match`` -> 304,
and the ``Cache-Control`` policy of documents that change whenever new data arrives.

``REVALIDATE`` (``private, max-age=0, must-revalidate``) lets a client or a private cache keep
a copy but makes it ask again every time; the answer to a matching ``If-None-Match`` is a
bodiless 304 (RFC 9110 sections 8.8.3, 13.1.2 and 15.4.5; RFC 9111 section 5.2.2). Shared
caches must not keep the documents: they are behind a bearer token.

:class:`ConditionalGetMiddleware` gives the same behaviour to JSON routes that set no ETag of
their own (the alert list), without touching them.
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Iterable
from typing import Any

from starlette.datastructures import Headers, MutableHeaders
from starlette.responses import Response
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from .http import JSON_MEDIA_TYPE, canonical_json, etag_matches

REVALIDATE = "private, max-age=0, must-revalidate"
# Documents pollers fetch repeatedly: diagnosis, series, alerts.
POLLED_PATHS = (r"^/v1/experiments/[^/]+/diagnosis$", r"^/v1/experiments/[^/]+/series$",
                r"^/v1/alerts(/[0-9]+)?$", r"^/v1/alerts/[0-9]+/deliveries$")
# Headers a 304 repeats from the 200 it stands for (RFC 9110 section 15.4.5).
_KEPT_ON_304 = ("etag", "cache-control", "vary", "content-location", "expires", "date",
                "x-inrush-diagnosis-version")
_MAX_BUFFERED = 8 * 1024 * 1024


def strong_etag(content: bytes) -> str:
    """A strong entity tag (quoted) from the SHA-256 of the representation's bytes."""
    return '"' + hashlib.sha256(content).hexdigest()[:32] + '"'


def not_modified(if_none_match: str | None, etag: str) -> bool:
    """Whether a GET with this ``If-None-Match`` should be answered 304."""
    return etag_matches(if_none_match, etag)


def cache_headers(etag: str, cache_control: str = REVALIDATE) -> dict[str, str]:
    return {"ETag": etag, "Cache-Control": cache_control}


def conditional_response(content: bytes, if_none_match: str | None, *,
                         media_type: str = JSON_MEDIA_TYPE, cache_control: str = REVALIDATE,
                         etag: str | None = None,
                         extra_headers: dict[str, str] | None = None) -> Response:
    """200 with ``content`` and its ETag, or a bodiless 304 when ``If-None-Match`` matches."""
    tag = etag or strong_etag(content)
    headers = {**(extra_headers or {}), **cache_headers(tag, cache_control)}
    if not_modified(if_none_match, tag):
        return Response(status_code=304, headers=headers)
    return Response(content, media_type=media_type, headers=headers)


def conditional_json(document: Any, if_none_match: str | None, *,
                     cache_control: str = REVALIDATE,
                     extra_headers: dict[str, str] | None = None) -> Response:
    """:func:`conditional_response` for a JSON document (canonical serialisation)."""
    return conditional_response(canonical_json(document), if_none_match,
                                cache_control=cache_control, extra_headers=extra_headers)


class ConditionalGetMiddleware:
    """Adds ETag, Cache-Control and 304 answers to successful JSON GETs of ``paths``.

    Only 200 answers without an ETag of their own are buffered and tagged; a route that sets
    its ETag is left alone except that it gets ``cache_control`` when it sets none.
    """

    def __init__(self, app: ASGIApp, paths: Iterable[str] = POLLED_PATHS,
                 cache_control: str = REVALIDATE) -> None:
        self.app = app
        self.patterns = [re.compile(p) for p in paths]
        self.cache_control = cache_control

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        # HEAD answers carry no body to hash: only GET is tagged here.
        if (scope["type"] != "http" or scope["method"] != "GET"
                or not any(p.match(scope["path"]) for p in self.patterns)):
            await self.app(scope, receive, send)
            return
        if_none_match = Headers(scope=scope).get("if-none-match")
        start: Message | None = None
        chunks: list[bytes] = []
        passthrough = False

        async def buffered_send(message: Message) -> None:
            nonlocal start, passthrough
            if message["type"] == "http.response.start":
                headers = MutableHeaders(scope=message)
                if "cache-control" not in headers:
                    headers["Cache-Control"] = self.cache_control
                tag_it = (message["status"] == 200 and "etag" not in headers
                          and headers.get("content-type", "").startswith(JSON_MEDIA_TYPE))
                if not tag_it:
                    passthrough = True
                    await send(message)
                    return
                start = message
                return
            if passthrough or start is None:
                await send(message)
                return
            chunks.append(message.get("body", b""))
            if sum(map(len, chunks)) > _MAX_BUFFERED:  # too big to tag: send as it is
                passthrough = True
                await send(start)
                await send({"type": "http.response.body", "body": b"".join(chunks),
                            "more_body": message.get("more_body", False)})
                return
            if message.get("more_body", False):
                return
            await self._finish(start, b"".join(chunks), if_none_match, send)

        await self.app(scope, receive, buffered_send)

    async def _finish(self, start: Message, body: bytes, if_none_match: str | None,
                      send: Send) -> None:
        tag = strong_etag(body)
        headers = MutableHeaders(scope=start)
        headers["ETag"] = tag
        if not_modified(if_none_match, tag):
            kept = [(k, v) for k, v in start["headers"] if k.decode("latin-1").lower()
                    in _KEPT_ON_304]
            await send({"type": "http.response.start", "status": 304, "headers": kept})
            await send({"type": "http.response.body", "body": b""})
            return
        await send(start)
        await send({"type": "http.response.body", "body": body})
