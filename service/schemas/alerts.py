"""Alert bodies."""

from __future__ import annotations

import datetime as dt
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field

AlertStatus = Literal["open", "acknowledged", "resolved"]


class AlertEventOut(BaseModel):
    at: dt.datetime
    action: str = Field(description="opened | acknowledged | resolved | reopened")
    from_status: str | None
    to_status: str
    actor: str = Field(description="token name, or 'inrush' for the service itself")
    note: str | None
    diagnosis_version: int | None


class AlertOut(BaseModel):
    id: int
    experiment: str
    kind: str = Field(description="srm | skewed_window | skewed_source | share_change (and, "
                                  "stored before incidents: skewed_day | share_changepoint | "
                                  "engagement_changepoint)")
    key: str
    status: AlertStatus
    severity: str
    title: str
    detail: dict[str, Any]
    active: bool = Field(description="whether the latest diagnosis still supports it")
    opened_at: dt.datetime
    last_seen_at: dt.datetime
    acknowledged_at: dt.datetime | None
    acknowledged_by: str | None
    resolved_at: dt.datetime | None
    resolved_by: str | None
    resolution_reason: str | None
    url: str


class AlertDetailOut(AlertOut):
    events: list[AlertEventOut]


class AlertPage(BaseModel):
    items: list[AlertOut]
    next: str | None = Field(description="cursor for the next page, null on the last page")
    next_url: str | None = None


class AlertAction(BaseModel):
    model_config = ConfigDict(extra="forbid")

    note: str | None = Field(None, max_length=2000, description="why; kept in the history")
