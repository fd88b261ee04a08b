"""Strict reading of JSON request bodies (and NUL-free URLs) before any route sees them.

Python's ``json`` module, which FastAPI uses, accepts more than RFC 8259 asks of a sender and
more than the service can store faithfully: ``NaN`` and ``Infinity`` literals, a member name
repeated in one object (the last value silently wins), and bodies in UTF-16 or UTF-32.
PostgreSQL text and ``jsonb`` cannot hold U+0000, and no database driver can encode a lone
surrogate (``"\\ud800"``). Each is refused here with a problem document that names it:

* 400 ``malformed-body``: not UTF-8, not JSON, NaN/Infinity, a repeated member, nested too
  deeply;
* 415 ``unsupported-media-type``: a body that is not declared as JSON on a route that only
  takes JSON;
* 422 ``invalid-input``: a string holding U+0000 or a lone surrogate, with its path;
* 404 / 422 for a NUL character (``%00``) in the path or the query string.

A body that passes is handed on byte for byte. Routes that parse their own bodies (CSV or JSON
observation uploads, see ``SELF_PARSED``) are left to do so with :func:`strict_loads`.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterable
from typing import Any
from urllib.parse import parse_qsl

from starlette.datastructures import Headers
from starlette.requests import Request
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from .http import BodyTooLargeError, media_type
from .problems import problem_response

JSON_METHODS = frozenset({"POST", "PUT", "PATCH", "DELETE"})
# (method, path pattern) of routes that read and check their bodies themselves.
SELF_PARSED: tuple[tuple[str, str], ...] = (("PUT", r"^/v1/experiments/[^/]+/observations$"),)
PathItem = str | int


class JSONBodyError(ValueError):
    """The body cannot be accepted as JSON; ``status`` 400 (unreadable) or 422 (a value)."""

    def __init__(self, message: str, *, status: int = 400, field: str = "body",
                 path: tuple[PathItem, ...] = ()) -> None:
        super().__init__(message)
        self.message = message
        self.status = status
        self.field = field
        self.path = path


class _RepeatedMemberError(ValueError):
    def __init__(self, name: str) -> None:
        super().__init__(name)
        self.name = name


def _unique_members(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    found = dict(pairs)
    if len(found) != len(pairs):  # rare: find the first repeated name for the message
        seen: set[str] = set()
        for name, _ in pairs:
            if name in seen:
                raise _RepeatedMemberError(name)
            seen.add(name)
    return found


def _no_constants(name: str) -> Any:
    raise ValueError(f"{name} is not a JSON number; send finite numbers")


def format_path(path: Iterable[PathItem]) -> str:
    """``("rows", 3, "source")`` -> ``rows[3].source``."""
    text = ""
    for part in path:
        text += f"[{part}]" if isinstance(part, int) else (f".{part}" if text else str(part))
    return text or "body"


def bad_string(text: str) -> str | None:
    """Why ``text`` cannot be stored, or ``None`` when it can."""
    if "\x00" in text:
        return "contains a NUL character (U+0000), which cannot be stored"
    if not text.isascii():
        try:
            text.encode("utf-8")
        except UnicodeEncodeError:
            return "contains a lone surrogate, which is not valid Unicode"
    return None


def _printable(text: str) -> str:
    """``text`` safe to echo in an answer (lone surrogates and NUL as escapes)."""
    return text.encode("utf-8", "backslashreplace").decode("utf-8").replace("\x00", "\\x00")


def find_bad_string(document: Any) -> tuple[tuple[PathItem, ...], str] | None:
    """The path of the first string (member name or value) that cannot be stored, and why.

    Iterative, so that deeply nested documents cannot exhaust the stack.
    """
    stack: list[tuple[tuple[PathItem, ...], Any]] = [((), document)]
    while stack:
        path, value = stack.pop()
        if isinstance(value, str):
            reason = bad_string(value)
            if reason is not None:
                return path, reason
        elif isinstance(value, dict):
            for name, item in value.items():
                reason = bad_string(name)
                if reason is not None:
                    return (*path, _printable(name)), f"member name {reason}"
                stack.append(((*path, name), item))
        elif isinstance(value, list):
            stack.extend(((*path, index), item) for index, item in enumerate(value))
    return None


def strict_loads(body: bytes, *, check_strings: bool = True) -> Any:
    """Parse a JSON body as RFC 8259 says a receiver may insist on; raise JSONBodyError.

    UTF-8 only (a byte-order mark is tolerated), no NaN/Infinity, no repeated member names;
    with ``check_strings`` also no string holding U+0000 or a lone surrogate (status 422).
    """
    try:
        text = body.decode("utf-8-sig")
    except UnicodeDecodeError as error:
        raise JSONBodyError(f"the body is not UTF-8 (byte {error.start}); JSON bodies must be "
                            "UTF-8") from None
    try:
        document = json.loads(text, parse_constant=_no_constants,
                              object_pairs_hook=_unique_members)
    except json.JSONDecodeError as error:
        raise JSONBodyError(f"the body is not valid JSON: {error.msg} at line {error.lineno} "
                            f"column {error.colno}") from None
    except _RepeatedMemberError as error:
        name = _printable(error.name)
        raise JSONBodyError(f"the member {name!r} appears more than once in one object; "
                            "send each name once", field=name) from None
    except RecursionError:
        raise JSONBodyError("the body is nested too deeply") from None
    except ValueError as error:  # NaN / Infinity
        raise JSONBodyError(str(error)) from None
    if check_strings:
        found = find_bad_string(document)
        if found is not None:
            path, reason = found
            raise JSONBodyError(f"{format_path(path)} {reason}", status=422,
                                field=format_path(path), path=path)
    return document


def is_json_media_type(kind: str) -> bool:
    return kind == "application/json" or (kind.startswith("application/")
                                          and kind.endswith("+json"))


class StrictJSONMiddleware:
    """Checks URLs for NUL and JSON bodies with :func:`strict_loads` before the routes run."""

    def __init__(self, app: ASGIApp, self_parsed: Iterable[tuple[str, str]] = SELF_PARSED
                 ) -> None:
        self.app = app
        self.self_parsed = [(method, re.compile(pattern)) for method, pattern in self_parsed]

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        refusal = _url_refusal(scope)
        if refusal is not None:
            await _answer(scope, receive, send, *refusal, where="query")
            return
        method = scope["method"]
        if method not in JSON_METHODS or any(
                method == m and pattern.match(scope["path"]) for m, pattern in self.self_parsed):
            await self.app(scope, receive, send)
            return
        try:
            body = await _read_body(receive)
        except BodyTooLargeError as error:
            await _answer(scope, receive, send, 413, str(error.detail), None)
            return
        if body:
            declared = Headers(scope=scope).get("content-type")
            kind = media_type(declared)
            if declared is not None and not is_json_media_type(kind):
                await _answer(scope, receive, send, 415,
                              f"Content-Type {kind or '(empty)'!r} is not accepted here: send "
                              "application/json.", None)
                return
            try:
                strict_loads(body)
            except JSONBodyError as error:
                detail = (f"The request was rejected: {error.message}" if error.status == 422
                          else f"{error.message[:1].upper()}{error.message[1:]}")
                await _answer(scope, receive, send, error.status,
                              f"{detail}; nothing was written.", error)
                return
        await self.app(scope, _replay(body, receive), send)


def _url_refusal(scope: Scope) -> tuple[int, str, JSONBodyError | None] | None:
    if "\x00" in scope["path"]:
        return 404, "No resource has a NUL character (%00) in its path.", None
    query: bytes = scope.get("query_string", b"")
    if b"%00" in query.lower() or b"\x00" in query:
        names = sorted({name for name, value in parse_qsl(query.decode("latin-1"),
                                                          keep_blank_values=True)
                        if "\x00" in name or "\x00" in value})
        field = ", ".join(n.replace("\x00", "%00") for n in names) or "query"
        return 422, f"Query parameter {field} contains a NUL character (%00).", JSONBodyError(
            "contains a NUL character (U+0000)", status=422, field=field)
    return None


async def _read_body(receive: Receive) -> bytes:
    chunks: list[bytes] = []
    while True:
        message = await receive()
        if message["type"] != "http.request":
            break
        chunks.append(message.get("body", b""))
        if not message.get("more_body", False):
            break
    return b"".join(chunks)


def _replay(body: bytes, receive: Receive) -> Receive:
    pending = True

    async def replayed() -> Message:
        nonlocal pending
        if pending:
            pending = False
            return {"type": "http.request", "body": body, "more_body": False}
        return await receive()

    return replayed


async def _answer(scope: Scope, receive: Receive, send: Send, status: int, detail: str,
                  error: JSONBodyError | None, *, where: str = "body") -> None:
    errors = None if error is None else [
        {"row": None, "field": error.field, "message": error.message, "in": where}]
    response = problem_response(Request(scope), status, detail, errors=errors)
    await response(scope, receive, send)
