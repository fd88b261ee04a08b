"""Campaign bodies and the pre-flight check as answered."""

from __future__ import annotations

import datetime as dt
import re
from typing import Annotated, Any

from pydantic import BaseModel, BeforeValidator, ConfigDict, Field, Strict, StringConstraints

from detectors.data import MAX_UNITS

from .observations import AlertCounts, DiagnosisRef

CampaignName = Annotated[str, StringConstraints(min_length=1, max_length=100,
                                                strip_whitespace=True)]
SourceName = Annotated[str, StringConstraints(min_length=1, max_length=128,
                                              strip_whitespace=True)]
_ISO_DAY = re.compile(r"[0-9]{4}-[0-9]{2}-[0-9]{2}")  # ASCII: \d takes other scripts' digits


def _iso_day_text(value: Any) -> Any:
    # pydantic alone would also take numbers (as timestamps) and date-times.
    if isinstance(value, dt.date) and not isinstance(value, dt.datetime):
        return value
    if not isinstance(value, str) or not _ISO_DAY.fullmatch(value.strip()):
        raise ValueError("must be a calendar date written YYYY-MM-DD")
    return value.strip()


Day = Annotated[dt.date, BeforeValidator(_iso_day_text)]
Share = Annotated[float, Strict(), Field(ge=0.0, le=1.0)]


class CampaignCreate(BaseModel):
    """A planned or past outreach campaign (email, push, SMS, paid link)."""

    model_config = ConfigDict(extra="forbid")

    name: CampaignName = Field(description="unique within the experiment")
    source: SourceName = Field(description="entry source its units arrive through, as the "
                                           "observation rows name it (e.g. newsletter)")
    start: Day = Field(description="first day, YYYY-MM-DD")
    end: Day = Field(description="last day (inclusive), YYYY-MM-DD")
    audience: dict[str, Share] = Field(
        min_length=1, max_length=26,
        description="{arm: share of that arm's units the campaign reaches, 0..1}; arms left "
                    "out are not reached")
    # At most as many units as an experiment may hold.
    expected_size: Annotated[int, Strict(), Field(ge=1, le=MAX_UNITS)] | None = Field(
        None, description="units the campaign is expected to bring over all its days; when "
                          "left out it is estimated from the experiment's recent traffic")


class CampaignCheckOut(BaseModel):
    """Whether the campaign will break the planned ratio, by how much, and the fix."""

    campaign: str
    balanced: bool = Field(description="true when it reaches the same share of every arm")
    warnings: list[str] = Field(description="empty for a balanced campaign")
    fix: str | None = Field(description="how to target it without breaking the ratio")
    size_per_day: float | None = Field(description="campaign arrivals a day used (null: unknown)")
    size_basis: str = Field(description="expected_size | recent_traffic | unknown")
    excess_unit: str = Field(description="units, or per_1000_arrivals when the size is unknown")
    expected_excess: dict[str, dict[str, float]] = Field(
        description="{day: {arm: expected units over plan}}; sums to 0 across arms each day")
    total_excess: dict[str, float] = Field(description="{arm: expected excess over its days}")
    arrival_shares: dict[str, dict[str, float]] = Field(
        description="{day: {arm: share of the campaign's arrivals landing in the arm}}")


class CampaignOut(BaseModel):
    name: str
    source: str
    start: dt.date
    end: dt.date
    audience: dict[str, float] = Field(description="every arm, 0 where it is not reached")
    expected_size: int | None
    created_at: dt.datetime
    check: CampaignCheckOut = Field(
        description="computed on the current allocation schedule and stored traffic")


class CampaignCreated(CampaignOut):
    diagnosis: DiagnosisRef | None = Field(
        description="the diagnosis re-run with the campaign known (null before any data)")
    alerts: AlertCounts


class CampaignList(BaseModel):
    items: list[CampaignOut]
