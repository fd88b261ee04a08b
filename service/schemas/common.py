"""Shared response models: problem details and pagination."""

from __future__ import annotations

from typing import Any

from pydantic import BaseModel, ConfigDict, Field


class ErrorItem(BaseModel):
    """One offending value: the 0-based row of the request (if any), the field and why."""

    row: int | None = Field(None, description="0-based position of the row in the request")
    field: str
    message: str
    line: int | None = Field(None, description="CSV bodies only: line in the file (header = 1)")


class ProblemDetails(BaseModel):
    """RFC 9457 problem details (``application/problem+json``)."""

    model_config = ConfigDict(extra="allow")

    type: str = Field(description="URI identifying the kind of problem; GET it for a description")
    title: str
    status: int
    detail: str
    instance: str | None = None
    errors: list[ErrorItem] | None = Field(None, description="validation problems, if any")
    errors_total: int | None = None


def problem_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    """OpenAPI ``responses`` entries documenting problem-details answers."""
    descriptions = {400: "Malformed body", 401: "Missing, unknown or revoked token",
                    403: "Token scope too low", 404: "Not found", 406: "Not acceptable",
                    409: "Conflict", 413: "Body or row count over the limit",
                    415: "Unsupported content type", 422: "Invalid input",
                    503: "Database unreachable"}
    # The app's OpenAPI hook gives every error response the problem+json ProblemDetails body.
    return {status: {"description": descriptions.get(status, "Error")} for status in statuses}
