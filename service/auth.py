"""Bearer-token authentication and scope checks as FastAPI dependencies (RFC 6750 challenges)."""

from __future__ import annotations

from collections.abc import Callable

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from sqlalchemy.orm import Session

from .db.session import get_session
from .problems import ProblemError
from .settings import Settings
from .tokens import Principal, Scope, authenticate

_bearer = HTTPBearer(auto_error=False, description="Authorization: Bearer TOKEN")
_REALM = 'Bearer realm="inrush"'


def require(scope: Scope) -> Callable[..., Principal]:
    """A dependency that answers 401 without a valid token and 403 below ``scope``."""

    def dependency(request: Request,
                   credentials: HTTPAuthorizationCredentials | None = Depends(_bearer),
                   session: Session = Depends(get_session)) -> Principal:
        if credentials is None or not credentials.credentials:
            raise ProblemError(401, "This endpoint needs Authorization: Bearer TOKEN.",
                               headers={"WWW-Authenticate": _REALM})
        settings: Settings = request.app.state.settings
        admin = settings.admin_token.get_secret_value() if settings.admin_token else None
        principal = authenticate(session, credentials.credentials, admin)
        if principal is None:
            raise ProblemError(401, "The bearer token is unknown or revoked.", headers={
                "WWW-Authenticate": f'{_REALM}, error="invalid_token"'})
        request.state.principal = principal.name  # the access log names who (never the token)
        if principal.scope < scope:
            raise ProblemError(
                403, f"The token {principal.name!r} has scope {principal.scope.name}; this "
                f"needs {scope.name}.", required_scope=scope.name, headers={
                    "WWW-Authenticate":
                        f'{_REALM}, error="insufficient_scope", scope="{scope.name}"'})
        return principal

    dependency.__name__ = f"require_{scope.name}"
    return dependency


require_read = require(Scope.read)
require_write = require(Scope.write)
require_admin = require(Scope.admin)
