"""The detection-sensitivity answer (``detectors.sensitivity.Sensitivity.to_dict``)."""

from __future__ import annotations

import datetime as dt

from pydantic import BaseModel, Field


class ArmSensitivity(BaseModel):
    arm: str
    units_per_day: float = Field(description="smallest extra units a day into this arm alone, "
                                             "held for `days` days, flagged with `power`")
    share_of_arm_traffic: float = Field(description="that inflow over the arm's planned daily "
                                                    "units")


class ArmShareShift(BaseModel):
    arm: str
    relative_share_shift: float | None
    units: float | None


class WholePeriodSensitivity(BaseModel):
    days: int
    total_units: int
    arm: str = Field(description="the arm needing the largest shift (the figure quoted)")
    relative_share_shift: float | None = Field(
        description="smallest relative shift of its share the anytime-valid overall test "
                    "catches with `power` at `overall_alpha` (null: none that small is "
                    "possible)")
    units: float | None
    by_arm: list[ArmShareShift]


class SensitivityOut(BaseModel):
    as_of: dt.date = Field(description="last day of traffic the figures come from")
    days: int = Field(description="length of the inflow asked about")
    window_days: int = Field(description="window the figure is computed on: min(days, "
                                         "max_window)")
    power: float
    alpha: float = Field(description="the window scan's alert level (family-wise, per look)")
    overall_alpha: float = Field(description="alert level of the anytime-valid whole-period "
                                             "test")
    max_window: int = Field(description="longest window the diagnosis scans")
    family_size: int = Field(description="the per-window level as an equivalent number of "
                             "Bonferroni-split windows (alpha / level)")
    level: float = Field(description="level at which the window ending today is tested: the "
                         "scan's lifetime alpha spent on that day and split over its windows")
    baseline_units_per_day: float
    weights: dict[str, float]
    arms: list[ArmSensitivity]
    whole_period: WholePeriodSensitivity
    summary: str
    caveats: list[str]
