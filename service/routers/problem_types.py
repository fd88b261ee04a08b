"""/problems/{slug}: what each problem ``type`` URI means (so the URIs dereference)."""

from __future__ import annotations

from fastapi import APIRouter
from pydantic import BaseModel

from ..problems import PROBLEM_TYPES, ProblemError
from ..schemas.common import problem_responses

router = APIRouter(tags=["health"])


class ProblemType(BaseModel):
    type: str
    title: str
    description: str


@router.get("/problems/{slug}", response_model=ProblemType, responses=problem_responses(404))
def problem_type(slug: str) -> ProblemType:
    if slug not in PROBLEM_TYPES:
        raise ProblemError(404, f"There is no problem type {slug!r}.")
    title, description = PROBLEM_TYPES[slug]
    return ProblemType(type=slug, title=title, description=description)
