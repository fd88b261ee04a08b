"""The diagnosis document (produced by ``detectors.diagnose``) as documented in OpenAPI."""

from __future__ import annotations

import datetime as dt
from typing import Any

from pydantic import BaseModel, ConfigDict, Field


class DiagnosisDocument(BaseModel):
    model_config = ConfigDict(extra="allow")

    experiment: str | None
    as_of: str | None
    status: str = Field(description="healthy | watch | alert")
    srm: dict[str, Any] = Field(description="statistic, p_value, sequential_p_value, observed, "
                                            "expected")
    flagged_days: list[dict[str, Any]]
    sources: list[dict[str, Any]]
    changepoints: dict[str, Any]
    incidents: list[dict[str, Any]] = Field(
        default_factory=list,
        description="one per episode (shape, arm, start, end, units, daily, sources, campaigns, "
                    "severity, material, impact, advice, evidence...), with the stored "
                    "incident's id, experiment, status, opened_at, acknowledged_at, "
                    "resolved_at, resolution and explained_by on the latest diagnosis")
    advice: list[str]


class SeriesDocument(BaseModel):
    model_config = ConfigDict(extra="allow")

    arms: list[str]
    dates: list[str]
    days: list[dict[str, Any]]
    sources: list[dict[str, Any]]


class SnapshotOut(BaseModel):
    version: int
    status: str
    as_of: dt.date | None
    computed_at: dt.datetime
    etag: str


class SnapshotList(BaseModel):
    items: list[SnapshotOut]
