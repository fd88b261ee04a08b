"""Observation bodies. The JSON body is checked for shape here; values are checked by
``detectors.data.validate_frame``, the same rules the offline CLI applies."""

from __future__ import annotations

from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, StrictFloat, StrictStr

# Any JSON number (not a string or a boolean); the stored value keeps the sender's int/float.
Number = StrictFloat


class MetricStats(BaseModel):
    """Sufficient statistics of a per-unit metric over the cohort's measured units."""

    model_config = ConfigDict(extra="forbid")

    n: Number = Field(description="measured units (whole, 0 <= n <= entered)")
    sum: Number = Field(description="sum of the metric over those units")
    sum_sq: Number = Field(description="sum of squares (>= sum^2 / n)")


class ObservationIn(BaseModel):
    model_config = ConfigDict(extra="forbid")

    date: StrictStr = Field(description="day of entry, YYYY-MM-DD")
    arm: StrictStr
    source: Annotated[StrictStr, Field(max_length=128)] | None = Field(
        None, description="entry source; missing means 'unattributed'")
    entered: Number = Field(description="units that entered (whole number >= 0)")
    metrics: dict[str, MetricStats] | None = None


class ObservationBatch(BaseModel):
    model_config = ConfigDict(extra="forbid")

    rows: list[ObservationIn]


class ObservationOut(BaseModel):
    date: str
    arm: str
    source: str
    entered: int
    metrics: dict[str, MetricStats]


class ObservationList(BaseModel):
    rows: list[ObservationOut]


class DiagnosisRef(BaseModel):
    status: str | None = Field(description="healthy | watch | alert; no_data before any unit")
    as_of: str | None
    version: int
    url: str


class AlertCounts(BaseModel):
    opened: int
    resolved: int


class WriteResult(BaseModel):
    written: int = Field(description="rows in the request, all stored")
    inserted: int
    updated: int = Field(description="rows that replaced a stored row with the same key")
    diagnosis: DiagnosisRef
    alerts: AlertCounts
