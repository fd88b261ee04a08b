"""Incident bodies: the INCIDENT of the contract with its lifecycle and history."""

from __future__ import annotations

import datetime as dt
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

IncidentStatus = Literal["open", "acknowledged", "resolved"]
Shape = Literal["inflow", "shortfall", "persistent", "allocation_step"]


class IncidentDay(BaseModel):
    date: dt.date
    units: float = Field(description="signed units over (+) or under (-) plan in the arm")


class IncidentSource(BaseModel):
    source: str
    share: float | None = Field(description="part of the episode's units this source carries")
    units: float | None = None


class IncidentEvidence(BaseModel):
    kind: str = Field(description="srm | skewed_day | skewed_source | share_changepoint | ...")
    key: str
    severity: str
    title: str
    detail: dict[str, Any]
    alert: int | None = Field(description="the stored finding (GET /v1/alerts/{id}), if kept")


class IncidentEventOut(BaseModel):
    at: dt.datetime
    action: str = Field(description="opened | updated | acknowledged | resolved | reopened")
    from_status: str | None
    to_status: str
    actor: str = Field(description="token name, or 'inrush' for the service itself")
    note: str | None
    changes: dict[str, Any] | None = Field(
        description="for an update: {field: [before, after]} of days, arm, shape, severity")
    diagnosis_version: int | None


class IncidentOut(BaseModel):
    id: int
    experiment: str
    status: IncidentStatus
    shape: Shape
    arm: str
    start: dt.date
    end: dt.date
    units: float = Field(description="signed: + over plan, - under plan, whole episode")
    units_meaning: str | None
    daily: list[IncidentDay]
    sources: list[IncidentSource]
    campaigns: list[str] = Field(description="registered campaigns on its days and source")
    explained_by: str | None = Field(description="what the registered campaigns say about it")
    severity: Literal["alert", "watch"]
    material: bool
    summary: str | None
    advice: list[str]
    impact: dict[str, dict[str, float | None]]
    observed_weights: dict[str, float] | None
    planned_weights: dict[str, float] | None
    context: list[str] = Field(description="outcome changepoints that coincide: context only")
    p_value: float | None
    detected_by: list[str]
    evidence: list[IncidentEvidence]
    active: bool = Field(description="whether the latest diagnosis still contains the episode")
    opened_at: dt.datetime
    last_seen_at: dt.datetime
    acknowledged_at: dt.datetime | None
    acknowledged_by: str | None
    resolved_at: dt.datetime | None
    resolved_by: str | None
    resolution: str | None
    url: str


class IncidentDetailOut(IncidentOut):
    events: list[IncidentEventOut]


class IncidentPage(BaseModel):
    items: list[IncidentOut]
    next: str | None = Field(description="cursor for the next page, null on the last page")
    next_url: str | None = None


class IncidentAction(BaseModel):
    model_config = ConfigDict(extra="forbid")

    note: str | None = Field(None, max_length=2000, description="why; kept in the history")
