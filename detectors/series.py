"""Daily series for dashboards: units, observed and planned shares, flags, sources, engagement."""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

import numpy as np

from .allocation import AllocationSchedule
from .data import ObservationTable

if TYPE_CHECKING:
    from .diagnose import Diagnosis


def daily_series(table: ObservationTable, schedule: AllocationSchedule,
                 diagnosis: Diagnosis | None = None) -> dict[str, Any]:
    """What a dashboard plots, one record per day (JSON-safe).

    Per day and arm: units entered, observed share of the day's units, planned share and, per
    metric, the entrants' mean; per source and day the units per arm. Days of an incident carry
    its severity and ``incident: {shape, arm, units}`` (the incident's figure for the day).

    Example:
        >>> import pandas as pd
        >>> rows = pd.DataFrame({"date": ["2026-03-01"] * 2, "arm": ["a", "b"],
        ...                      "entered": [60, 40]})
        >>> t = ObservationTable.from_frame(rows, ["a", "b"])
        >>> s = daily_series(t, AllocationSchedule.constant(["a", "b"]))
        >>> s["days"][0]["arms"]["a"]["observed_share"]
        0.6
    """
    arms, sources = table.arms, table.sources
    planned = schedule.weights_on(table.dates)
    counts = table.daily_totals
    totals = counts.sum(axis=1, keepdims=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        shares = np.where(totals > 0, counts / np.where(totals > 0, totals, 1), np.nan)
        means = {name: _daily_mean(cube) for name, cube in table.metrics.items()}
    severity: dict[str, str] = {}
    episode_day: dict[str, dict[str, Any]] = {}
    if diagnosis is not None:
        severity = {d.date.isoformat(): d.severity for d in diagnosis.flagged_days}
        episode_day = {d.date.isoformat(): {"shape": d.shape, "arm": d.arm,
                                            "units": round(d.units, 1)}
                       for d in diagnosis.flagged_days}
    day_labels = [d.isoformat() for d in table.date_list()]
    days = []
    for i, label in enumerate(day_labels):
        days.append({
            "date": label,
            "flagged": label in severity,
            "severity": severity.get(label),
            "incident": episode_day.get(label),
            "arms": {arm: {
                "entered": int(counts[i, a]),
                "observed_share": _safe(shares[i, a]),
                "expected_share": round(float(planned[i, a]), 6),
                "expected": round(float(totals[i, 0] * planned[i, a]), 2),
                "engagement": {name: _safe(m[i, a]) for name, m in means.items()},
            } for a, arm in enumerate(arms)},
        })
    by_source = [{
        "source": source,
        "entered": {arm: table.entered[:, a, s].astype(int).tolist()
                    for a, arm in enumerate(arms)},
    } for s, source in enumerate(sources)]
    return {"arms": list(arms), "dates": day_labels, "days": days, "sources": by_source,
            "metrics": list(table.metrics)}


def _daily_mean(cube: np.ndarray) -> np.ndarray:
    """Entrants' mean per day and arm of a ``(days, arms, sources, stats)`` metric cube."""
    daily = cube.sum(axis=2)
    return daily[:, :, 1] / daily[:, :, 0]


def _safe(value: float) -> float | None:
    return round(float(value), 6) if np.isfinite(value) else None
