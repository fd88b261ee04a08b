"""Hand-made episodes and a stand-in diagnosis, for the service's incident tests.

The incident rules under test are the service's own bookkeeping (matching by day overlap,
lifecycle, notifications), so those tests feed hand-made episodes through :class:`StandIn`;
the end-to-end tests use the detectors' own episodes.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from types import SimpleNamespace
from typing import Any

from detectors import DiagnosisConfig
from detectors.episodes import (
    INFLOW,
    Episode,
    EpisodeCell,
    EpisodeDay,
    Evidence,
    SourceContribution,
)

START = dt.date(2026, 10, 26)


def day(offset: int) -> dt.date:
    return START + dt.timedelta(days=offset)


def episode(days: Sequence[int], *, arm: str = "cards", units: float = 450.0,
            shape: str = INFLOW, severity: str = "alert", source: str = "newsletter",
            campaigns: Sequence[str] = (), extra_evidence: Sequence[Evidence] = ()) -> Episode:
    """An episode on ``days`` (offsets from START) of ``units`` a day in ``arm``."""
    dates = [day(d) for d in days]
    evidence = tuple(Evidence("skewed_day", d.isoformat(), severity,
                              f"{d.isoformat()}: {arm} got {units:+.0f} units over plan",
                              {"date": d.isoformat()}) for d in dates) + tuple(extra_evidence)
    return Episode(
        shape=shape, arm=arm, start=min(dates), end=max(dates), units=units * len(dates),
        daily=tuple(EpisodeDay(d, units) for d in dates),
        cells=tuple(EpisodeCell(d, source, units) for d in dates),
        sources=(SourceContribution(source, 1.0, units * len(dates)),),
        campaigns=tuple(campaigns), severity=severity, material=severity == "alert",
        p_value=1e-6, detected_by=("scan",),
        summary=f"{arm} got {units * len(dates):+.0f} units over plan",
        units_meaning="units over plan in the arm against the other arms",
        advice=("Send the campaign to an equal share of every arm.",), evidence=evidence)


class StandIn:
    """What the service reads of a Diagnosis, with the episodes a test chooses."""

    def __init__(self, *episodes: Episode, status: str | None = None) -> None:
        self.episodes = tuple(episodes)
        self.status = status or ("alert" if any(e.severity == "alert" and e.material
                                                for e in episodes)
                                 else "watch" if episodes else "healthy")
        self.config = DiagnosisConfig()
        self.as_of = max((e.end for e in episodes), default=START)
        # Read by service.alerting's resolution reasons.
        self.srm = SimpleNamespace(p_value=0.2, sequential_p_value=0.4)
        self.flagged_days: tuple[Any, ...] = ()
        self.sources: tuple[Any, ...] = ()

    def findings(self) -> tuple[Evidence, ...]:
        seen: dict[tuple[str, str], Evidence] = {}
        for item in self.episodes:
            for evidence in item.evidence:
                seen.setdefault((evidence.kind, evidence.key), evidence)
        return tuple(seen.values())

    def to_dict(self) -> dict[str, Any]:
        return {"experiment": "route-cards", "as_of": self.as_of.isoformat(),
                "status": self.status, "incidents": [e.to_dict() for e in self.episodes]}
