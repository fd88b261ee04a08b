"""Re-weighting request and response."""

from __future__ import annotations

import datetime as dt
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator


class ReweightRequest(BaseModel):
    model_config = ConfigDict(extra="forbid")

    metric: str = Field(min_length=1, max_length=64)
    target: Literal["reference_arm", "pooled_unflagged", "custom"] = Field(
        "reference_arm", description="cohort mix to re-weight every arm to")
    weights: dict[str, float] | None = Field(
        None, description="custom target only: {cohort: weight}")
    by: list[Literal["source", "window"]] = Field(
        default_factory=lambda: ["source"],
        description='["source"] or ["source", "window"] (window: flagged or unflagged days)')
    exclude_sources: list[str] = Field(default_factory=list, max_length=1000)
    exclude_dates: list[dt.date] = Field(default_factory=list, max_length=10_000)

    @model_validator(mode="after")
    def _consistent(self) -> ReweightRequest:
        if self.by not in (["source"], ["source", "window"]):
            raise ValueError('by must be ["source"] or ["source", "window"]')
        if self.target == "custom" and not self.weights:
            raise ValueError("target 'custom' needs weights {cohort: weight}")
        if self.target != "custom" and self.weights is not None:
            raise ValueError("weights are only used with target 'custom'")
        return self


class ReweightResponse(BaseModel):
    model_config = ConfigDict(extra="allow")

    metric: str
    comparisons: list[dict[str, Any]]
    cohorts: list[Any]
    caveats: list[str]
