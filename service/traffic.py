"""Daily units per arm of an experiment, and the detection sensitivity they allow.

The campaign pre-flight check estimates a campaign's size from this traffic and the
sensitivity answer (:func:`detectors.sensitivity.sensitivity`) is computed on it. The day axis
is the diagnosis's: contiguous from the experiment's start to the last day with units.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np

from detectors import AllocationSchedule, DiagnosisConfig, ObservationTable
from detectors.sensitivity import sensitivity

from .jsonsafe import json_safe

if TYPE_CHECKING:  # the offline CLI uses this module without a database
    from sqlalchemy.orm import Session

    from .db.models import Experiment

DEFAULT_SENSITIVITY_DAYS = 2


@dataclass(frozen=True)
class ArmTraffic:
    """``counts[d, a]``: units that entered arm ``a`` on ``dates[d]``; ``planned``: the weights
    in force that day. The last day holds units."""

    arms: tuple[str, ...]
    dates: np.ndarray
    counts: np.ndarray
    planned: np.ndarray

    @property
    def last_date(self) -> dt.date:
        return self.dates[-1].item()

    def before(self, day: dt.date) -> ArmTraffic | None:
        """The days before ``day`` up to the last of them with units (``None`` if none has)."""
        keep = self.dates < np.datetime64(day, "D")
        return _trimmed(self.arms, self.dates[keep], self.counts[keep], self.planned[keep])

    @classmethod
    def from_table(cls, table: ObservationTable, schedule: AllocationSchedule
                   ) -> ArmTraffic | None:
        """From an observation table (the offline CLI's input)."""
        return _trimmed(tuple(table.arms), table.dates, table.daily_totals.astype(float),
                        schedule.weights_on(table.dates))


def stored_arm_traffic(session: Session, experiment: Experiment) -> ArmTraffic | None:
    """Daily arm totals of the stored rows, summed in the database (``None`` without units)."""
    from sqlalchemy import func, select

    from .db.models import Observation

    rows = session.execute(
        select(Observation.date, Observation.arm, func.sum(Observation.entered))
        .where(Observation.experiment_id == experiment.id)
        .group_by(Observation.date, Observation.arm)).all()
    if not rows:
        return None
    arms = tuple(experiment.arms)
    first = min(experiment.start_date, min(row[0] for row in rows))
    last = max(row[0] for row in rows)
    dates = np.arange(np.datetime64(first, "D"), np.datetime64(last, "D") + 1)
    counts = np.zeros((dates.size, len(arms)))
    day_index = np.array([(row[0] - first).days for row in rows])
    arm_index = np.array([arms.index(row[1]) for row in rows])
    # PostgreSQL sums a BIGINT column as NUMERIC: convert through int.
    np.add.at(counts, (day_index, arm_index), np.array([int(row[2]) for row in rows], float))
    schedule = AllocationSchedule.from_steps(list(arms), experiment.allocation)
    return _trimmed(arms, dates, counts, schedule.weights_on(dates))


def sensitivity_document(traffic: ArmTraffic, *, days: int = DEFAULT_SENSITIVITY_DAYS,
                         alpha: float | None = None, max_window: int | None = None
                         ) -> dict[str, Any]:
    """:func:`detectors.sensitivity.sensitivity` on the traffic, as a JSON-safe document with
    the last day of traffic (``as_of``). Thresholds default to :class:`DiagnosisConfig`'s."""
    defaults = DiagnosisConfig()
    result = sensitivity(traffic.counts, traffic.planned, traffic.arms, days=days,
                         alpha=defaults.scan_alpha if alpha is None else alpha,
                         max_window=defaults.max_window if max_window is None else max_window,
                         overall_alpha=defaults.alpha,
                         concentration=defaults.sequential_concentration)
    return json_safe({"as_of": traffic.last_date.isoformat(), **result.to_dict()})


def thresholds_of(document: dict[str, Any] | None) -> tuple[float | None, int | None]:
    """``(scan alpha, max_window)`` a stored diagnosis document was computed with, if it says:
    the window scan is the test an inflow of a few days must pass."""
    thresholds = (document or {}).get("thresholds") or {}
    return (thresholds.get("scan_alpha", thresholds.get("alpha")),
            thresholds.get("max_window_days"))


def _trimmed(arms: tuple[str, ...], dates: np.ndarray, counts: np.ndarray,
             planned: np.ndarray) -> ArmTraffic | None:
    active = np.flatnonzero(counts.sum(axis=1) > 0)
    if active.size == 0:
        return None
    stop = int(active[-1]) + 1
    return ArmTraffic(arms, dates[:stop], counts[:stop], planned[:stop])


__all__ = ["DEFAULT_SENSITIVITY_DAYS", "ArmTraffic", "sensitivity_document",
           "stored_arm_traffic", "thresholds_of"]
