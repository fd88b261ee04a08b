"""Episodes: the findings of one imbalance event grouped, with a shape and one unit figure.

An episode is what the service stores as an incident: the days on which one arm's units were
off plan, the shape of the imbalance (after the SRM cause taxonomy of Fabijan, Gupchup, Gupta,
Omhover, Qin, Vermeer & Dmitriev, "Diagnosing Sample Ratio Mismatch in Online Controlled
Experiments", KDD 2019), the sources and registered campaigns behind it, and how much it can
move the effect estimate.

Shapes:

- ``inflow``: extra units entered one arm on some days (campaign, partner link);
- ``shortfall``: units went missing from one arm (lost, filtered, crashed clients);
- ``persistent``: the ratio is off by a steady amount from the first day (assignment, bot
  filtering, logging);
- ``allocation_step``: from some day the shares follow other weights than the declared
  schedule (a ramp applied late or early).

The unit figure is one formula everywhere (report, page, incident, webhook):

- ``inflow`` and ``shortfall``: units over (+) or under (-) plan in ``arm`` judged against the
  other arms, ``c_k - p_k / (1 - p_k) * sum_{j != k} c_j`` per day: the units that would have to
  leave (or join) ``arm`` alone for the day's counts to match the plan;
- ``allocation_step`` and ``persistent``: units moved into ``arm`` from the other arms,
  ``c_k - p_k * n`` per day (the day's total is taken as right, only its split is off).
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

INFLOW, SHORTFALL, PERSISTENT, ALLOCATION_STEP = (
    "inflow", "shortfall", "persistent", "allocation_step")
SHAPES = (INFLOW, SHORTFALL, PERSISTENT, ALLOCATION_STEP)


@dataclass(frozen=True, slots=True)
class EpisodeDay:
    """Signed units over (+) or under (-) plan in the episode's arm on one day."""

    date: dt.date
    units: float


@dataclass(frozen=True, slots=True)
class EpisodeCell:
    """Signed units over or under plan in the episode's arm on one (day, source) cell.

    Cells carry the excess where it sits, so an estimator can leave exactly these cells out
    (or trim them) and a bound can be computed per cell.
    """

    date: dt.date
    source: str
    units: float


@dataclass(frozen=True, slots=True)
class SourceContribution:
    """A source's share of the episode's units (shares of the sources that add to it sum to 1)."""

    source: str
    share: float
    units: float


@dataclass(frozen=True, slots=True)
class MetricImpact:
    """How much the episode can move the effect on one metric (arm vs reference arm).

    ``estimated_bias``: naive minus honest estimate, in the metric's units; ``worst_case``: the
    largest shift the trimming bounds allow; ``in_se``: ``worst_case`` over the naive
    estimate's standard error.
    """

    estimated_bias: float | None
    worst_case: float | None
    standard_error: float | None
    in_se: float | None

    def to_dict(self) -> dict[str, float | None]:
        return {"estimated_bias": self.estimated_bias, "worst_case": self.worst_case,
                "standard_error": self.standard_error, "in_se": self.in_se}


@dataclass(frozen=True, slots=True)
class Evidence:
    """One finding behind an episode: ``kind`` and ``key`` identify it across diagnoses."""

    kind: str
    key: str
    severity: str
    title: str
    detail: Mapping[str, Any]


@dataclass(frozen=True)
class Episode:
    """One imbalance event. ``key`` is stable across re-diagnoses of growing data only in the
    sense that an episode overlapping a stored one's days is the same episode; the service
    matches them by day overlap (see :func:`overlaps`)."""

    shape: str
    arm: str
    start: dt.date
    end: dt.date
    units: float
    daily: tuple[EpisodeDay, ...]
    cells: tuple[EpisodeCell, ...]
    sources: tuple[SourceContribution, ...]
    campaigns: tuple[str, ...]
    severity: str  # alert | watch
    material: bool
    p_value: float  # the deciding p-value (lifetime-valid)
    detected_by: tuple[str, ...]
    summary: str
    units_meaning: str
    advice: tuple[str, ...]
    evidence: tuple[Evidence, ...]
    impact: Mapping[str, MetricImpact] = field(default_factory=dict)
    observed_weights: Mapping[str, float] | None = None
    planned_weights: Mapping[str, float] | None = None
    context: tuple[str, ...] = ()  # outcome changepoints that coincide: shown, never decisive
    ongoing: bool = False  # the episode reaches the last day of data
    alert_level: float = 0.0  # the level the deciding p-value is compared with

    @property
    def days(self) -> tuple[dt.date, ...]:
        return tuple(d.date for d in self.daily)

    def overlaps(self, start: dt.date, end: dt.date, *, gap_days: int = 1) -> bool:
        """Whether ``[start, end]`` touches this episode's span, allowing ``gap_days``."""
        slack = dt.timedelta(days=gap_days)
        return start <= self.end + slack and self.start <= end + slack

    def to_dict(self) -> dict[str, Any]:
        return {
            "shape": self.shape, "arm": self.arm, "start": self.start.isoformat(),
            "end": self.end.isoformat(), "ongoing": self.ongoing,
            "units": round(self.units, 1), "units_meaning": self.units_meaning,
            "daily": [{"date": d.date.isoformat(), "units": round(d.units, 1)}
                      for d in self.daily],
            "cells": [{"date": c.date.isoformat(), "source": c.source,
                       "units": round(c.units, 1)} for c in self.cells],
            "sources": [{"source": s.source, "share": round(s.share, 4),
                         "units": round(s.units, 1)} for s in self.sources],
            "campaigns": list(self.campaigns), "severity": self.severity,
            "material": self.material, "p_value": self.p_value,
            "alert_level": self.alert_level,
            "detected_by": list(self.detected_by), "summary": self.summary,
            "impact": {m: i.to_dict() for m, i in self.impact.items()},
            "observed_weights": (None if self.observed_weights is None
                                 else {a: round(w, 4) for a, w in self.observed_weights.items()}),
            "planned_weights": (None if self.planned_weights is None
                                else {a: round(w, 4) for a, w in self.planned_weights.items()}),
            "context": list(self.context), "advice": list(self.advice),
            "evidence": [{"kind": e.kind, "key": e.key, "severity": e.severity,
                          "title": e.title, "detail": dict(e.detail)} for e in self.evidence],
        }
