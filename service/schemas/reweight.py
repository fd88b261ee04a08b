"""Re-weighting request and response."""

from __future__ import annotations

import datetime as dt
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, model_validator


class ReweightRequest(BaseModel):
    """Only ``metric`` given: the service chooses (the answer's ``default`` says what and why).

    ``target="uncontaminated"``: the honest estimate (cohorts by source within allocation
    periods, the incidents' cells left out, weighted by the regular population); it takes no
    ``by``, ``weights`` or exclusions.
    """

    model_config = ConfigDict(extra="forbid")

    metric: str = Field(min_length=1, max_length=64)
    target: Literal["reference_arm", "pooled_unflagged", "custom", "uncontaminated"] = Field(
        "reference_arm", description="cohort mix to re-weight every arm to; without any option "
        "the service chooses 'uncontaminated'")
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
        if self.target == "uncontaminated" and (
                {"by", "exclude_sources", "exclude_dates"} & self.model_fields_set):
            raise ValueError("target 'uncontaminated' chooses its own cohorts: by, "
                             "exclude_sources and exclude_dates are not used with it")
        return self

    @property
    def is_default(self) -> bool:
        """Whether the caller gave no option besides the metric."""
        return self.model_fields_set <= {"metric"}


class Bounds(BaseModel):
    """Trimming bounds (Lee 2009) and their Imbens-Manski (2004) interval; null if undefined."""

    low: float | None
    high: float | None
    ci_low: float | None
    ci_high: float | None


class ExcludedCell(BaseModel):
    date: dt.date
    source: str
    arm: str
    units: float = Field(description="signed units over (+) or under (-) plan in arm")


class DefaultChoice(BaseModel):
    """What the service chose when the request gave only a metric, and why."""

    target: str
    by: list[str]
    excluded_cells: list[ExcludedCell]
    reason: str


class ReweightComparison(BaseModel):
    model_config = ConfigDict(extra="allow")

    arm: str
    naive: dict[str, float | None]
    adjusted: dict[str, float | None]
    decomposition: dict[str, float | None]
    bounds: Bounds = Field(description="on the difference (arm minus reference arm)")
    relative_bounds: Bounds = Field(description="on the relative lift")


class ReweightResponse(BaseModel):
    model_config = ConfigDict(extra="allow")

    metric: str
    target: str
    by: list[str]
    comparisons: list[ReweightComparison]
    cohorts: list[Any]
    caveats: list[str]
    default: DefaultChoice | None = Field(
        None, description="set when the request gave only a metric: the target, cohorts and "
        "excluded cells the service chose, and why")
