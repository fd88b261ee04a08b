"""API tokens: minting, hashing, lookup and revocation. Only SHA-256 hashes are stored."""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import re
import secrets
from dataclasses import dataclass
from enum import IntEnum
from typing import Protocol

from sqlalchemy import select
from sqlalchemy.orm import Session

from .db.models import ApiToken, utcnow

TOKEN_PREFIX = "inr_"
NAME_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._@-]{0,99}$")
BOOTSTRAP_NAME = "bootstrap-admin"
SYSTEM_ACTOR = "inrush"  # the service itself, e.g. when it resolves an alert


class Scope(IntEnum):
    """Ordered scopes: each includes the ones below it."""

    read = 1
    write = 2
    admin = 3

    @classmethod
    def parse(cls, text: str) -> Scope:
        try:
            return cls[text]
        except KeyError:
            raise ValueError(f"unknown scope {text!r}: use read, write or admin") from None


@dataclass(frozen=True, slots=True)
class Principal:
    """Who is calling: the token's name (recorded on alert transitions) and its scope."""

    name: str
    scope: Scope
    token_id: int | None = None


class TokenError(ValueError):
    """A token operation cannot be done (bad or reserved name...)."""


class TokenNameTakenError(TokenError):
    """Another token has this name (names are never reused, revoked tokens keep theirs)."""


class UnknownTokenError(TokenError):
    """No token has this id or name."""


def hash_token(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def generate_token() -> str:
    return TOKEN_PREFIX + secrets.token_urlsafe(32)


def create_token(session: Session, scope: Scope, name: str | None = None
                 ) -> tuple[ApiToken, str]:
    """Store a new token; returns the row and the plain token (shown once, never stored)."""
    if name is None:
        name = f"{scope.name}-{secrets.token_hex(4)}"
    if not NAME_PATTERN.match(name):
        raise TokenError("token names are 1-100 letters, digits and . _ @ - "
                         "(starting with a letter or digit)")
    if name in (BOOTSTRAP_NAME, SYSTEM_ACTOR):
        raise TokenError(f"the name {name!r} is reserved")
    if session.scalar(select(ApiToken.id).where(ApiToken.name == name)) is not None:
        raise TokenNameTakenError(f"a token named {name!r} exists already (names are never reused)")
    plain = generate_token()
    token = ApiToken(name=name, scope=scope.name, token_hash=hash_token(plain),
                     created_at=utcnow())
    session.add(token)
    session.flush()
    return token, plain


def find_token(session: Session, ident: str) -> ApiToken | None:
    """A token by numeric id or by name."""
    # ASCII digits only ("²".isdigit() is true) and within the INTEGER id column.
    if ident.isascii() and ident.isdigit() and int(ident) <= 2**31 - 1:
        found = session.get(ApiToken, int(ident))
        if found is not None:
            return found
    return session.scalar(select(ApiToken).where(ApiToken.name == ident))


def revoke_token(session: Session, ident: str) -> ApiToken:
    token = find_token(session, ident)
    if token is None:
        raise UnknownTokenError(f"no token with id or name {ident!r}")
    if token.revoked_at is None:
        token.revoked_at = utcnow()
    return token


def list_tokens(session: Session) -> list[ApiToken]:
    return list(session.scalars(select(ApiToken).order_by(ApiToken.id)))


def bootstrap_principal(digest: str, admin_token: str | None) -> Principal | None:
    """The bootstrap admin when ``digest`` is the hash of ``INRUSH_ADMIN_TOKEN``."""
    if admin_token and hmac.compare_digest(digest, hash_token(admin_token)):
        return Principal(BOOTSTRAP_NAME, Scope.admin)
    return None


class StoredToken(Protocol):
    """What :func:`stored_principal` reads of a stored token (an ``ApiToken`` row or a plain
    record of its columns)."""

    id: int
    name: str
    scope: str
    token_hash: str
    revoked_at: dt.datetime | None


def stored_principal(stored: StoredToken | None, digest: str) -> Principal | None:
    """The principal of the stored token found by ``digest``, unless it is revoked."""
    if stored is None or stored.revoked_at is not None:
        return None
    # The lookup matched on the hash already; compare again in constant time so that the
    # decision itself never depends on a short-circuiting string comparison.
    if not hmac.compare_digest(stored.token_hash, digest):
        return None
    return Principal(stored.name, Scope[stored.scope], stored.id)


def authenticate(session: Session, presented: str, admin_token: str | None) -> Principal | None:
    """The principal for a presented bearer token, or ``None`` when it is unknown or revoked."""
    digest = hash_token(presented)
    return bootstrap_principal(digest, admin_token) or stored_principal(
        session.scalar(select(ApiToken).where(ApiToken.token_hash == digest)), digest)
