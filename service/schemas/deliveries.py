"""Webhook delivery bodies."""

from __future__ import annotations

import datetime as dt

from pydantic import BaseModel, Field


class DeliveryAttemptOut(BaseModel):
    attempt: int = Field(description="1 for the first try")
    started_at: dt.datetime
    duration_ms: int | None
    status_code: int | None = Field(description="HTTP status of the answer, null without one")
    error: str | None = Field(description="why the attempt failed, null when delivered (a "
                                          "redirect's target for write or admin tokens only)")
    response_excerpt: str | None = Field(description="start of the receiver's answer (up to "
                                                     "500 characters); write or admin tokens "
                                                     "only, null for read tokens")


class DeliveryOut(BaseModel):
    id: int
    event_id: str = Field(description="the webhook-id header: the same on every retry")
    event_type: str = Field(description="incident.opened | incident.updated | "
                                        "incident.resolved (alert.opened | alert.resolved "
                                        "before incidents)")
    status: str = Field(description="pending | delivering | delivered | failed")
    attempts: int
    next_attempt_at: dt.datetime | None = Field(description="when the next try is due")
    created_at: dt.datetime
    delivered_at: dt.datetime | None
    history: list[DeliveryAttemptOut]


class DeliveryList(BaseModel):
    alert: int
    webhook_configured: bool = Field(description="whether the experiment has a webhook now")
    items: list[DeliveryOut]


class IncidentDeliveryList(BaseModel):
    incident: int
    webhook_configured: bool = Field(description="whether the experiment has a webhook now")
    items: list[DeliveryOut]
