"""Webhook signatures per the Standard Webhooks specification (standardwebhooks.com).

Each message carries three headers: ``webhook-id`` (the event id, the same on every retry so
receivers can drop duplicates), ``webhook-timestamp`` (unix seconds of this attempt) and
``webhook-signature``: ``v1,`` followed by the base64 HMAC-SHA256 of ``"{id}.{timestamp}.{body}"``.
The key is the base64-decoded part of a ``whsec_<base64>`` secret. A secret without that prefix
(experiments may register any shared string of 8+ characters) is used as its UTF-8 bytes.

Example:
    >>> secret = "whsec_" + "a2V5LWZvci1kb2N0ZXN0cw=="   # base64 of b"key-for-doctests"
    >>> header = sign(secret, "evt_1", 1767225600, b'{"type":"alert.opened"}')
    >>> verify(secret, {"webhook-id": "evt_1", "webhook-timestamp": "1767225600",
    ...                 "webhook-signature": header}, b'{"type":"alert.opened"}',
    ...        now=1767225610)
    True
"""

from __future__ import annotations

import base64
import binascii
import hashlib
import hmac
import secrets
import time
from collections.abc import Mapping

SECRET_PREFIX = "whsec_"
VERSION = "v1"
DEFAULT_TOLERANCE_SECONDS = 300


class SignatureError(ValueError):
    """A signature could not be checked (missing header, malformed secret or timestamp)."""


def generate_secret(key_bytes: int = 32) -> str:
    """A fresh ``whsec_`` secret with a random key of ``key_bytes`` bytes (24 to 64)."""
    if not 24 <= key_bytes <= 64:
        raise ValueError("key_bytes must be between 24 and 64")
    return SECRET_PREFIX + base64.b64encode(secrets.token_bytes(key_bytes)).decode("ascii")


def secret_key(secret: str) -> bytes:
    """The HMAC key of ``secret``: base64-decoded after ``whsec_``, else the UTF-8 bytes."""
    if not secret:
        raise SignatureError("the webhook secret is empty")
    if secret.startswith(SECRET_PREFIX):
        try:
            key = base64.b64decode(secret[len(SECRET_PREFIX):], validate=True)
        except (binascii.Error, ValueError):
            raise SignatureError("the part after whsec_ is not valid base64") from None
        if not key:
            raise SignatureError("the webhook secret has an empty key")
        return key
    return secret.encode("utf-8")


def signed_content(msg_id: str, timestamp: int, body: bytes) -> bytes:
    return f"{msg_id}.{int(timestamp)}.".encode() + body


def signature(secret: str, msg_id: str, timestamp: int, body: bytes) -> str:
    """The bare base64 signature (without the ``v1,`` prefix)."""
    digest = hmac.new(secret_key(secret), signed_content(msg_id, timestamp, body),
                      hashlib.sha256).digest()
    return base64.b64encode(digest).decode("ascii")


def sign(secret: str, msg_id: str, timestamp: int, body: bytes) -> str:
    """The ``webhook-signature`` header value: ``v1,<base64 HMAC-SHA256>``."""
    return f"{VERSION},{signature(secret, msg_id, timestamp, body)}"


def headers(secret: str | None, msg_id: str, timestamp: int, body: bytes) -> dict[str, str]:
    """The three Standard Webhooks headers (no signature header without a secret)."""
    out = {"webhook-id": msg_id, "webhook-timestamp": str(int(timestamp))}
    if secret:
        out["webhook-signature"] = sign(secret, msg_id, timestamp, body)
    return out


def verify(secret: str, message_headers: Mapping[str, str], body: bytes, *,
           tolerance_seconds: int = DEFAULT_TOLERANCE_SECONDS, now: float | None = None) -> bool:
    """Whether ``body`` with these headers was signed with ``secret`` within the tolerance.

    The header may list several space-separated signatures (key rotation); one valid ``v1``
    signature suffices. Comparison is constant-time. Raises :class:`SignatureError` when a
    header is missing or malformed; answers ``False`` for a wrong or stale signature.
    """
    lowered = {k.lower(): v for k, v in message_headers.items()}
    try:
        msg_id = lowered["webhook-id"]
        stamp = lowered["webhook-timestamp"]
        given = lowered["webhook-signature"]
    except KeyError as missing:
        raise SignatureError(f"header {missing.args[0]} is missing") from None
    try:
        timestamp = int(stamp)
    except ValueError:
        raise SignatureError(f"webhook-timestamp {stamp!r} is not unix seconds") from None
    current = time.time() if now is None else now
    if abs(current - timestamp) > tolerance_seconds:
        return False
    expected = signature(secret, msg_id, timestamp, body).encode("ascii")
    valid = False
    for candidate in given.split():
        version, _, value = candidate.partition(",")
        if version == VERSION and hmac.compare_digest(value.encode("ascii", "replace"),
                                                      expected):
            valid = True
    return valid
