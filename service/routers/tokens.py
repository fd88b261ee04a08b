"""/v1/tokens: mint, list and revoke API tokens (admin scope)."""

from __future__ import annotations

from fastapi import APIRouter, Depends
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from .. import tokens
from ..auth import require_admin
from ..db.models import ApiToken
from ..db.session import begin_write, get_session
from ..problems import ProblemError
from ..schemas.common import problem_responses
from ..schemas.tokens import TokenCreate, TokenCreated, TokenList, TokenOut

router = APIRouter(prefix="/v1/tokens", tags=["tokens"])


@router.post("", status_code=201, response_model=TokenCreated,
             responses=problem_responses(400, 401, 403, 409, 422))
def create_token(body: TokenCreate, session: Session = Depends(get_session),
                 _: tokens.Principal = Depends(require_admin)) -> TokenCreated:
    """Mint a token; the answer is the only time the token itself is shown."""
    begin_write(session)
    try:
        token, plain = tokens.create_token(session, tokens.Scope.parse(body.scope), body.name)
    except tokens.TokenNameTakenError as error:
        raise ProblemError(409, f"{error}.") from None
    except tokens.TokenError as error:
        raise ProblemError(422, f"{error}.", errors=[
            {"row": None, "field": "name", "message": str(error)}]) from None
    try:
        session.commit()
    except IntegrityError:  # the same name minted concurrently
        session.rollback()
        raise ProblemError(409, f"A token named {body.name!r} exists already.") from None
    return TokenCreated(**token_out(token).model_dump(), token=plain)


@router.get("", response_model=TokenList, responses=problem_responses(401, 403))
def list_tokens(session: Session = Depends(get_session),
                _: tokens.Principal = Depends(require_admin)) -> TokenList:
    return TokenList(items=[token_out(t) for t in tokens.list_tokens(session)])


@router.delete("/{ident}", response_model=TokenOut, responses=problem_responses(401, 403, 404))
def revoke_token(ident: str, session: Session = Depends(get_session),
                 _: tokens.Principal = Depends(require_admin)) -> TokenOut:
    """Revoke a token by id or name (revoking twice is harmless)."""
    begin_write(session)
    try:
        token = tokens.revoke_token(session, ident)
    except tokens.UnknownTokenError as error:
        raise ProblemError(404, f"{error}.") from None
    session.commit()
    return token_out(token)


def token_out(token: ApiToken) -> TokenOut:
    return TokenOut(id=token.id, name=token.name, scope=token.scope,
                    created_at=token.created_at, revoked_at=token.revoked_at)
