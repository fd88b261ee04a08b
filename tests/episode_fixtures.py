"""Episodes and diagnoses with episodes, for the service's incident tests.

The incident rules under test are the service's own bookkeeping (matching by day overlap,
lifecycle, notifications), so most tests feed hand-made episodes through :class:`StandIn`.
:func:`with_episodes` gives a real diagnosis episodes where the detectors do not yet group
findings into them: the alert-level flagged days on consecutive dates form one inflow episode
with the findings behind it as evidence. A diagnosis that has ``episodes`` passes unchanged.
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


class WithEpisodes:
    """A real diagnosis with episodes grouped from its alert-level flagged days."""

    def __init__(self, diagnosis: Any) -> None:
        self._diagnosis = diagnosis
        self.episodes = _group(diagnosis)

    def __getattr__(self, name: str) -> Any:
        return getattr(self._diagnosis, name)

    def findings(self) -> tuple[Any, ...]:
        seen: dict[tuple[str, str], Any] = {}
        for item in self.episodes:
            for evidence in item.evidence:
                seen.setdefault((evidence.kind, evidence.key), evidence)
        return tuple(seen.values())

    def to_dict(self) -> dict[str, Any]:
        return {**self._diagnosis.to_dict(), "incidents": [e.to_dict() for e in self.episodes]}


def with_episodes(diagnosis: Any) -> Any:
    if getattr(diagnosis, "episodes", None) is not None:
        return diagnosis
    return WithEpisodes(diagnosis)


def _group(diagnosis: Any) -> tuple[Episode, ...]:
    days = [d for d in diagnosis.flagged_days if d.severity == "alert"]
    runs: list[list[Any]] = []
    for flagged in days:
        if runs and (flagged.date - runs[-1][-1].date).days <= 2:
            runs[-1].append(flagged)
        else:
            runs.append([flagged])
    findings = {(f.kind, f.key): f for f in diagnosis.findings()}
    episodes = []
    for run in runs:
        arm = run[0].inflow_arm
        daily = tuple(EpisodeDay(d.date, float(d.excess[arm])) for d in run)
        by_source: dict[str, float] = {}
        for flagged in run:
            for share in flagged.sources:
                by_source[share.source] = by_source.get(share.source, 0.0) + share.excess
        total = sum(u for u in by_source.values() if u > 0) or 1.0
        evidence = [findings[("skewed_day", d.date.isoformat())] for d in run]
        evidence += [f for (kind, key), f in findings.items()
                     if kind == "skewed_source" and by_source.get(key, 0.0) > 0]
        evidence += [f for (kind, _), f in findings.items() if kind == "srm"]
        units = sum(d.units for d in daily)
        episodes.append(Episode(
            shape=INFLOW, arm=arm, start=run[0].date, end=run[-1].date, units=units,
            daily=daily, cells=(),
            sources=tuple(SourceContribution(s, u / total, u) for s, u in by_source.items()),
            campaigns=tuple(sorted({c for d in run for c in d.campaigns})),
            severity="alert", material=True, p_value=min(d.p_value for d in run),
            detected_by=("scan",), summary=f"{arm} got {units:+.0f} units over plan",
            units_meaning="units over plan", advice=tuple(diagnosis.advice),
            evidence=tuple(Evidence(f.kind, f.key, f.severity, f.title, f.detail)
                           for f in evidence)))
    return tuple(episodes)
