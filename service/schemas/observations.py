"""Observation bodies. The JSON body is checked for shape here; values are checked by
``detectors.data.validate_frame``, the same rules the offline CLI applies."""

from __future__ import annotations

from typing import Annotated, Any

import msgspec
from msgspec import UNSET, UnsetType
from pydantic import BaseModel, ConfigDict, Field, StrictFloat, StrictStr

from detectors.data import MAX_METRICS

# Any JSON number (not a string or a boolean); the stored value keeps the sender's int/float.
Number = StrictFloat
_SOURCE_LIMIT = 128  # characters of an entry source


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
    metrics: Annotated[dict[str, MetricStats], Field(max_length=MAX_METRICS)] | None = Field(
        None, description=f"per metric name its statistics; at most {MAX_METRICS} metrics per "
                          "experiment")


class ObservationBatch(BaseModel):
    model_config = ConfigDict(extra="forbid")

    rows: list[ObservationIn]


class PlainStats(msgspec.Struct, forbid_unknown_fields=True):
    """:class:`MetricStats` for the fast JSON reader (``service.ingest``); as strict or
    stricter: a property test checks it accepts nothing the model refuses."""

    n: int | float
    sum: int | float
    sum_sq: int | float


class PlainRow(msgspec.Struct, forbid_unknown_fields=True):
    """:class:`ObservationIn` for the fast JSON reader. ``UNSET`` marks a member the row
    does not have (``None`` one sent as ``null``), so that the reader can count members."""

    date: str
    arm: str
    entered: int | float
    source: Annotated[str, msgspec.Meta(max_length=_SOURCE_LIMIT)] | UnsetType | None = UNSET
    metrics: Annotated[dict[str, PlainStats], msgspec.Meta(max_length=MAX_METRICS)] \
        | UnsetType | None = UNSET


class PlainBatch(msgspec.Struct, forbid_unknown_fields=True):
    rows: list[PlainRow]


class ObservationOut(BaseModel):
    date: str
    arm: str
    source: str
    entered: int
    metrics: dict[str, MetricStats]


class ObservationList(BaseModel):
    rows: list[ObservationOut]
    next: str | None = Field(None, description="cursor of the next page (with `limit`); null "
                                               "on the last page and in a streamed answer")


class DiagnosisRef(BaseModel):
    status: str | None = Field(description="healthy | watch | alert; no_data before any unit")
    as_of: str | None
    version: int
    url: str


class AlertCounts(BaseModel):
    opened: int
    resolved: int


class IncidentCounts(BaseModel):
    opened: int = Field(description="incidents opened (new or reopened) by this write")
    updated: int = Field(description="incidents whose days, arm, shape or severity changed")
    resolved: int = Field(description="incidents the new data no longer supports")


class WriteResult(BaseModel):
    written: int = Field(description="rows in the request, all stored")
    inserted: int
    updated: int = Field(description="rows that replaced a stored row with the same key")
    diagnosis: DiagnosisRef
    alerts: AlertCounts = Field(description="findings (the incidents' evidence)")
    incidents: IncidentCounts


_ROW_FIELDS = frozenset(ObservationIn.model_fields)
_STAT_FIELDS = frozenset(MetricStats.model_fields)
_NUMBER = (int, float)


def rows_plainly_conform(rows: list[Any]) -> bool:
    """Whether every JSON row certainly passes :class:`ObservationIn`, checked field by field
    over the whole list (several times faster than building a model per row).

    ``False`` does not mean invalid: the caller then validates with the model, which names
    each problem. The check is strictly narrower than the model (a property test compares
    them): exact ``dict``/``str``/``int``/``float`` types, no unknown members.
    """
    if not all(type(row) is dict and row.keys() <= _ROW_FIELDS for row in rows):
        return False
    dates = [row.get("date") for row in rows]
    arms = [row.get("arm") for row in rows]
    sources = [row.get("source") for row in rows]
    entered = [row.get("entered") for row in rows]
    metrics = [row.get("metrics") for row in rows]
    return (all(type(value) is str for value in dates)
            and all(type(value) is str for value in arms)
            and all(value is None or (type(value) is str and len(value) <= _SOURCE_LIMIT)
                    for value in sources)
            and all(type(value) in _NUMBER for value in entered)
            and all(value is None or (type(value) is dict and len(value) <= MAX_METRICS and all(
                type(name) is str and type(stats) is dict and stats.keys() == _STAT_FIELDS
                and type(stats["n"]) in _NUMBER and type(stats["sum"]) in _NUMBER
                and type(stats["sum_sq"]) in _NUMBER for name, stats in value.items()))
                for value in metrics))
