"""One HTTP delivery of a signed webhook: check the target, connect to the checked address,
never follow redirects, keep a short excerpt of the answer."""

from __future__ import annotations

import json
import time
from collections.abc import Collection, Mapping
from dataclasses import dataclass
from typing import Any

import httpx

from . import signing
from .safety import Resolver, UnsafeTargetError, check_target, pinned_url, system_resolver

USER_AGENT = "Inrush-Webhooks/1"
EXCERPT_CHARS = 500
_READ_LIMIT = 16 * 1024
# Answers after which retrying cannot help: the receiver says the endpoint is gone.
PERMANENT_STATUSES = frozenset({410})


@dataclass(frozen=True, slots=True)
class DeliveryResult:
    """What one attempt achieved."""

    delivered: bool
    permanent: bool
    status_code: int | None
    error: str | None
    response_excerpt: str | None
    duration_ms: int


def encode_body(payload: Mapping[str, Any]) -> bytes:
    """The exact bytes that are signed and sent."""
    return json.dumps(payload, separators=(",", ":"), ensure_ascii=False,
                      allow_nan=False).encode("utf-8")


def make_client(timeout_seconds: float) -> httpx.Client:
    """An HTTP client for deliveries: bounded timeouts, no redirects, no proxy from the
    environment (a proxy would connect to the name again, past the address check)."""
    timeout = httpx.Timeout(timeout_seconds, connect=min(timeout_seconds, 5.0))
    return httpx.Client(timeout=timeout, follow_redirects=False, trust_env=False,
                        headers={"user-agent": USER_AGENT})


def deliver(client: httpx.Client, url: str, secret: str | None, event_id: str,
            body: bytes, *, allow_hosts: Collection[str] = (),
            resolver: Resolver = system_resolver, timestamp: int | None = None,
            timeout_seconds: float = 10.0) -> DeliveryResult:
    """POST ``body`` to ``url`` signed with ``secret``; any 2xx answer counts as delivered."""
    started = time.monotonic()

    def result(delivered: bool, *, permanent: bool = False, status: int | None = None,
               error: str | None = None, excerpt: str | None = None) -> DeliveryResult:
        return DeliveryResult(delivered, permanent, status, error, excerpt,
                              round((time.monotonic() - started) * 1000))

    try:
        target = check_target(url, allow_hosts=allow_hosts, resolver=resolver)
    except UnsafeTargetError as error:
        return result(False, error=f"target refused: {error}")
    stamp = int(time.time()) if timestamp is None else int(timestamp)
    request_url, host_headers, extensions = pinned_url(target)
    try:
        signed = signing.headers(secret, event_id, stamp, body)
    except signing.SignatureError as error:  # a malformed stored secret: retrying cannot help
        return result(False, permanent=True, error=f"cannot sign the message: {error}")
    headers = {**signed, **host_headers, "content-type": "application/json"}
    request = client.build_request("POST", request_url, content=body, headers=headers,
                                   extensions=extensions)
    deadline = started + timeout_seconds
    try:
        response = client.send(request, stream=True, follow_redirects=False)
    except httpx.TimeoutException as error:
        return result(False, error=f"timed out ({type(error).__name__}) after "
                                   f"{timeout_seconds:g} s")
    except httpx.HTTPError as error:
        return result(False, error=f"{type(error).__name__}: {error}"[:1000])
    try:
        excerpt = _excerpt(response, deadline)
    finally:
        response.close()
    status = response.status_code
    if 200 <= status < 300:
        return result(True, status=status, excerpt=excerpt)
    if 300 <= status < 400:
        where = response.headers.get("location", "(no Location)")
        return result(False, status=status, excerpt=excerpt,
                      error=f"answered {status} redirecting to {where[:300]}; redirects are "
                            "not followed: register the final URL")
    return result(False, permanent=status in PERMANENT_STATUSES, status=status,
                  excerpt=excerpt, error=f"answered {status}")


def _excerpt(response: httpx.Response, deadline: float) -> str | None:
    """The start of the answer, read within the deadline and a size limit."""
    data = b""
    try:
        for chunk in response.iter_bytes():
            data += chunk
            if len(data) >= _READ_LIMIT or time.monotonic() > deadline:
                break
    except httpx.HTTPError:
        pass
    if not data:
        return None
    return data[:_READ_LIMIT].decode("utf-8", errors="replace")[:EXCERPT_CHARS]
