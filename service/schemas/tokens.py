"""API token bodies."""

from __future__ import annotations

import datetime as dt
from typing import Literal

from pydantic import BaseModel, ConfigDict, Field


class TokenCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")

    scope: Literal["read", "write", "admin"]
    name: str | None = Field(None, min_length=1, max_length=100,
                             description="unique, never reused; default SCOPE-RANDOM")


class TokenOut(BaseModel):
    id: int
    name: str
    scope: str
    created_at: dt.datetime
    revoked_at: dt.datetime | None


class TokenCreated(TokenOut):
    token: str = Field(description="the bearer token; shown only in this answer")


class TokenList(BaseModel):
    items: list[TokenOut]
