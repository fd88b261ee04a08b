"""One call that runs every detector and assembles the diagnosis document.

``diagnose`` runs the deciding tests, each valid when the diagnosis is read again after every
upload, and groups what they find into episodes (:mod:`detectors.episode_finder`):

- the window scan over 1..``max_window`` days, its level spent over the experiment's life
  (:func:`detectors.srm.scan_windows`);
- the mixture e-detector of a change in arm shares, for episodes of any length
  (:mod:`detectors.change_detection`);
- the anytime-valid Dirichlet-multinomial test over the whole period (Lindon & Malek 2022);
- per-source anytime-valid tests, Bonferroni-Holm across sources.

Each family alerts below its own lifetime level and is shown as ``watch`` below
``watch_alpha``; by the union bound, an A/A experiment ever raises an alert with probability
at most ``scan_alpha + change_alpha + 2 alpha`` and is ever shown as ``watch`` with probability
at most ``4 watch_alpha`` (0.5% and 4% with the defaults; measured in benchmarks/RESULTS.md).
Changepoints (PELT) localise and describe; outcome-metric changepoints are context only.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .allocation import AllocationSchedule
from .change_detection import ChangeDetection, detect_share_change
from .changepoints import (
    ChangepointConfig,
    EngagementChangepoint,
    ShareChangepoint,
    engagement_changepoints,
    share_changepoints,
)
from .data import ObservationTable
from .episode_finder import (
    KnownCampaign,
    Signal,
    find_episodes,
    window_signals,
)
from .episodes import Episode, EpisodeCell, MetricImpact
from .errors import InputError
from .sensitivity import inflow_sensitivity
from .sequential import DEFAULT_CONCENTRATION, sequential_srm
from .srm import overall_srm, scan_windows
from .stratify import (
    IndependenceTest,
    SourceShare,
    attribute_excess,
    excess_by_source,
    expected_by_source,
    independence_test,
    source_fits,
)

# Builds the impact function of one diagnosis: (table, schedule) -> ((cells, arm) -> impacts).
ImpactFactory = Callable[[ObservationTable, AllocationSchedule],
                         Callable[[tuple[EpisodeCell, ...], str], Mapping[str, MetricImpact]]]


@dataclass(frozen=True, slots=True)
class DiagnosisConfig:
    """Thresholds of the diagnosis; every level holds over the experiment's whole life.

    ``alpha``: alert level of the anytime-valid whole-period and per-source tests (p < 0.0005,
    a common rule of thumb for SRM alarms; common practice, no source). ``scan_alpha``: the
    window scan's lifetime level; ``change_alpha``: the change detector's. ``watch_alpha``:
    the lifetime level at which each family's evidence is shown as ``watch``.
    ``max_window``: longest run of days scanned. ``materiality``: an episode whose worst-case
    effect shift is below this many standard errors on every metric is shown as ``watch``.
    ``unseen_share`` and ``unseen_days``: a clean result says what could have gone unseen when
    an inflow of ``unseen_days`` days must exceed this share of an arm's traffic to be flagged.
    """

    alpha: float = 0.0005
    scan_alpha: float = 0.002
    change_alpha: float = 0.002
    watch_alpha: float = 0.01
    max_window: int = 7
    materiality: float = 0.25
    unseen_share: float = 0.25
    unseen_days: int = 2
    sequential_concentration: float = DEFAULT_CONCENTRATION
    changepoints: ChangepointConfig | None = None
    detect_changepoints: bool = True

    def __post_init__(self) -> None:
        if not 0 < self.alpha < self.watch_alpha < 1:
            raise InputError("need 0 < alpha < watch_alpha < 1", field="alpha")
        if not 0 < self.scan_alpha < self.watch_alpha:
            raise InputError("need 0 < scan_alpha < watch_alpha", field="scan_alpha")
        if not 0 < self.change_alpha < self.watch_alpha:
            raise InputError("need 0 < change_alpha < watch_alpha", field="change_alpha")
        if not 1 <= self.max_window <= 31:
            raise InputError("max_window must be between 1 and 31 days", field="max_window")
        if not self.materiality >= 0:
            raise InputError("materiality must be >= 0", field="materiality")
        if not (self.unseen_share > 0 and 1 <= self.unseen_days <= 31):
            raise InputError("need unseen_share > 0 and 1 <= unseen_days <= 31",
                             field="unseen_share")


@dataclass(frozen=True, slots=True)
class SrmSummary:
    statistic: float
    p_value: float
    sequential_p_value: float
    observed: dict[str, int]
    expected: dict[str, float]
    mismatch: bool


@dataclass(frozen=True, slots=True)
class FlaggedDay:
    """A day of an episode. ``units`` is the episode's figure for the day; ``excess`` the
    observed minus expected units of every arm."""

    date: dt.date
    severity: str
    p_value: float
    shape: str
    arm: str
    units: float
    excess: dict[str, float]
    sources: tuple[SourceShare, ...]
    campaigns: tuple[str, ...]
    reasons: tuple[str, ...]

    @property
    def inflow_arm(self) -> str:
        return self.arm


@dataclass(frozen=True, slots=True)
class SourceSummary:
    source: str
    observed: dict[str, int]
    expected: dict[str, float]
    p_value: float
    adjusted_p_value: float
    sequential_p_value: float
    adjusted_sequential_p_value: float
    skewed: bool


@dataclass(frozen=True, slots=True)
class Finding:
    """Evidence behind an episode: ``kind`` and ``key`` identify it across diagnoses."""

    kind: str
    key: str
    severity: str
    title: str
    detail: dict[str, Any]


@dataclass(frozen=True, slots=True)
class Unseen:
    """What a clean result cannot rule out: the smallest ``days``-day inflow the scan flags
    with 80% probability, per arm, when it exceeds ``unseen_share`` of the arm's traffic."""

    days: int
    units_per_day: dict[str, float]
    share_of_arm_traffic: dict[str, float]
    text: str


@dataclass(frozen=True)
class Diagnosis:
    """The diagnosis of one experiment as of its last day of data."""

    experiment: str | None
    as_of: dt.date | None
    status: str
    srm: SrmSummary
    flagged_days: tuple[FlaggedDay, ...]
    sources: tuple[SourceSummary, ...]
    independence: IndependenceTest
    share_changepoints: tuple[ShareChangepoint, ...]
    engagement_changepoints: dict[str, dict[str, tuple[EngagementChangepoint, ...]]]
    advice: tuple[str, ...]
    config: DiagnosisConfig = field(default_factory=DiagnosisConfig)
    episodes: tuple[Episode, ...] = ()
    change: ChangeDetection | None = None
    unseen: Unseen | None = None

    @property
    def alert_days(self) -> tuple[dt.date, ...]:
        return tuple(d.date for d in self.flagged_days if d.severity == "alert")

    def findings(self) -> tuple[Finding, ...]:
        """The evidence of every episode, each with a stable ``(kind, key)``."""
        found: dict[tuple[str, str], Finding] = {}
        for episode in self.episodes:
            for e in episode.evidence:
                found.setdefault((e.kind, e.key),
                                 Finding(e.kind, e.key, e.severity, e.title, dict(e.detail)))
        return tuple(found.values())

    def to_dict(self) -> dict[str, Any]:
        """The diagnosis document of the HTTP contract (JSON-safe)."""
        change = self.change
        return {
            "experiment": self.experiment,
            "as_of": self.as_of.isoformat() if self.as_of else None,
            "status": self.status,
            "incidents": [e.to_dict() for e in self.episodes],
            "srm": {
                "statistic": _num(self.srm.statistic),
                "p_value": _num(self.srm.p_value),
                "sequential_p_value": _num(self.srm.sequential_p_value),
                "observed": self.srm.observed,
                "expected": _round(self.srm.expected),
                "mismatch": self.srm.mismatch,
            },
            "share_change": {
                "p_value": _num(change.final_p_value) if change else None,
                "start": (None if change is None or change.start is None or self.as_of is None
                          else self._date(change.start).isoformat()),
            },
            "flagged_days": [_flagged_day_dict(d) for d in self.flagged_days],
            "sources": [_source_dict(s) for s in self.sources],
            "source_arm_independence": {
                "statistic": _num(self.independence.statistic),
                "p_value": _num(self.independence.p_value),
                "dof": self.independence.dof,
            },
            "changepoints": {
                "share": [{"date": c.date.isoformat(), "before": _round(c.before),
                           "after": _round(c.after)} for c in self.share_changepoints],
                "engagement": {
                    metric: {arm: [{"date": c.date.isoformat(), "before": _num(c.before),
                                    "after": _num(c.after)} for c in changes]
                             for arm, changes in per_arm.items()}
                    for metric, per_arm in self.engagement_changepoints.items()},
            },
            "unseen": None if self.unseen is None else {
                "days": self.unseen.days,
                "units_per_day": {a: round(v, 1) for a, v in self.unseen.units_per_day.items()},
                "share_of_arm_traffic": {a: round(v, 4) for a, v in
                                         self.unseen.share_of_arm_traffic.items()},
                "text": self.unseen.text},
            "advice": list(self.advice),
            "thresholds": {"alpha": self.config.alpha, "scan_alpha": self.config.scan_alpha,
                           "change_alpha": self.config.change_alpha,
                           "watch_alpha": self.config.watch_alpha,
                           "max_window_days": self.config.max_window,
                           "materiality": self.config.materiality},
        }

    def _date(self, index: int) -> dt.date:
        days = len(self.change.log_e) if self.change is not None else 0
        assert self.as_of is not None
        return self.as_of - dt.timedelta(days=days - 1 - index)


def diagnose(table: ObservationTable, schedule: AllocationSchedule, *,
             config: DiagnosisConfig | None = None, experiment: str | None = None,
             as_of: dt.date | None = None,
             campaigns: Sequence[KnownCampaign] = (),
             impact: ImpactFactory | None = None) -> Diagnosis:
    """Run every detector on ``table`` against ``schedule``.

    ``as_of`` truncates the data to days up to that date (default: the last day with units).
    Known ``campaigns`` are named as the likely cause of an episode on their days and source.
    ``impact`` builds, for this table, the function giving an episode's effect on each metric
    (:func:`detectors.contamination.impact_function`); without it episodes count as material.

    Example:
        >>> import pandas as pd
        >>> days = pd.date_range("2026-03-01", periods=14).strftime("%Y-%m-%d")
        >>> rows = pd.DataFrame({"date": list(days) * 2,
        ...     "arm": ["control"] * 14 + ["cards"] * 14, "source": "organic",
        ...     "entered": [5000] * 14 + [5000] * 9 + [5700] + [5000] * 4})
        >>> t = ObservationTable.from_frame(rows, ["control", "cards"])
        >>> d = diagnose(t, AllocationSchedule.constant(["control", "cards"]))
        >>> d.status, [(e.shape, e.arm, e.start.isoformat(), round(e.units)) for e in d.episodes]
        ('alert', [('inflow', 'cards', '2026-03-10', 700)])
    """
    config = config or DiagnosisConfig()
    if tuple(schedule.arms) != tuple(table.arms):
        raise InputError(f"schedule arms {list(schedule.arms)} differ from the data's arms "
                         f"{list(table.arms)}", field="arms")
    active = np.flatnonzero(table.entered.sum(axis=(1, 2)) > 0)
    if active.size == 0:
        raise InputError("no units entered on any day: nothing to diagnose", field="entered")
    if as_of is not None:
        keep = table.dates <= np.datetime64(as_of, "D")
        if not keep.any():
            raise InputError(f"no data on or before {as_of.isoformat()}", field="as_of")
        table = table.select(day_mask=keep)
        active = np.flatnonzero(table.entered.sum(axis=(1, 2)) > 0)
        if active.size == 0:
            raise InputError("no units entered on or before as_of", field="as_of")
    table = table.select(day_mask=np.arange(table.n_days) <= active[-1])
    with_units = [s for i, s in enumerate(table.sources) if table.entered[:, :, i].sum() > 0]
    if len(with_units) < len(table.sources):  # sources that only appear after as_of
        table = table.select(sources=with_units)
    arms, sources, dates = table.arms, table.sources, table.dates
    planned = schedule.weights_on(dates)
    counts = table.daily_totals

    overall = overall_srm(counts, planned)
    sequential = sequential_srm(counts, planned, config.sequential_concentration)
    srm = SrmSummary(
        overall.statistic, overall.p_value, sequential.final_p_value,
        {a: int(v) for a, v in zip(arms, overall.observed, strict=True)},
        {a: float(v) for a, v in zip(arms, overall.expected, strict=True)},
        bool(sequential.final_p_value < config.alpha))
    scan = scan_windows(counts, planned, max_window=config.max_window,
                        watch_alpha=config.watch_alpha)
    change = detect_share_change(counts, planned, config.sequential_concentration)
    fits = source_fits(table.entered, planned, sources, alpha=config.alpha,
                       concentration=config.sequential_concentration)
    source_summaries = tuple(SourceSummary(
        f.source, {a: int(v) for a, v in zip(arms, f.observed, strict=True)},
        {a: float(v) for a, v in zip(arms, f.expected, strict=True)},
        f.p_value, f.adjusted_p_value, f.sequential_p_value, f.adjusted_sequential_p_value,
        f.skewed) for f in fits)
    independence = independence_test(table.entered)

    share_changes: tuple[ShareChangepoint, ...] = ()
    engagement: dict[str, dict[str, tuple[EngagementChangepoint, ...]]] = {}
    if config.detect_changepoints:
        share_changes = share_changepoints(counts, planned, dates, arms, config.changepoints)
        for metric, cube in table.metrics.items():
            per_arm = engagement_changepoints(cube.sum(axis=2), dates, arms, config.changepoints)
            # With two arms the reference arm's gap mirrors the other arm's: report it once.
            mirrored = {arms[0]} if len(arms) == 2 else set()
            engagement[metric] = {a: c for a, c in per_arm.items() if c and a not in mirrored}
            if not engagement[metric]:
                del engagement[metric]

    signals = _signals(scan.selected, change, srm, source_summaries, dates, config)
    episodes = find_episodes(
        table, planned, signals, share_changes=share_changes, engagement=engagement,
        allocation_changes=schedule.change_dates(), campaigns=campaigns,
        impact=impact(table, schedule) if impact is not None and table.metrics else None,
        materiality=config.materiality)
    flagged = _flagged_days(episodes, table, planned)
    status = _status(episodes)
    unseen = _unseen(counts, planned, arms, config) if not episodes else None
    advice = _advice(status, episodes, engagement, schedule, unseen, config)
    return Diagnosis(experiment, dates[-1].item(), status, srm, flagged, source_summaries,
                     independence, share_changes, engagement, advice, config, episodes,
                     change, unseen)


def _signals(windows: Sequence[Any], change: ChangeDetection, srm: SrmSummary,
             sources: Sequence[SourceSummary], dates: np.ndarray, config: DiagnosisConfig
             ) -> list[Signal]:
    """Every deciding test's evidence, with the levels it is read at."""
    signals = window_signals(windows, dates, config.scan_alpha, config.watch_alpha,
                             config.max_window)
    if change.start is not None and change.peak is not None \
            and change.final_p_value < config.watch_alpha:
        first = dates[change.start].item().isoformat()
        signals.append(Signal(
            "share_change", first, change.final_p_value, config.change_alpha,
            config.watch_alpha, (change.start, change.peak),
            f"Arm shares changed from about {first} (sequential change test, anytime-valid "
            f"p = {change.final_p_value:.2g})",
            {"start": first, "peak": dates[change.peak].item().isoformat(),
             "p_value": change.final_p_value, "alert_level": config.change_alpha,
             "test": "mixture of Dirichlet-multinomial test martingales over start days"}))
    if srm.sequential_p_value < config.watch_alpha:
        signals.append(Signal(
            "srm", "overall", srm.sequential_p_value, config.alpha, config.watch_alpha, None,
            f"Sample ratio mismatch over the whole period (anytime-valid p = "
            f"{srm.sequential_p_value:.2g})",
            {"p_value": srm.sequential_p_value, "chi_square_p_value": srm.p_value,
             "alert_level": config.alpha, "observed": srm.observed,
             "expected": _round(srm.expected)}))
    for source in sources:
        if source.adjusted_sequential_p_value < config.watch_alpha:
            signals.append(Signal(
                "skewed_source", source.source, source.adjusted_sequential_p_value,
                config.alpha, config.watch_alpha, None,
                f"Source {source.source} does not follow the allocation (anytime-valid p = "
                f"{source.adjusted_sequential_p_value:.2g} after Holm across sources)",
                _source_dict(source) | {"alert_level": config.alpha}, source=source.source))
    return signals


def _flagged_days(episodes: Sequence[Episode], table: ObservationTable, planned: np.ndarray
                  ) -> tuple[FlaggedDay, ...]:
    arms, dates = table.arms, table.dates
    index = {d.item(): i for i, d in enumerate(dates)}
    excess = excess_by_source(table.entered, planned)
    flagged = []
    for episode in episodes:
        arm = arms.index(episode.arm)
        for day in episode.daily:
            i = index[day.date]
            shares = attribute_excess(excess[i:i + 1] * np.sign(episode.units or 1.0), arm,
                                      table.sources)
            reasons = [f"{episode.shape.replace('_', ' ')} episode {episode.start.isoformat()}"
                       f"..{episode.end.isoformat()}: {day.units:+,.0f} units in {episode.arm} "
                       "on this day"]
            if shares:
                reasons.append(f"source {shares[0].source} explains "
                               f"{100 * shares[0].share_of_excess:.0f}% of the day's imbalance")
            reasons.extend(f"campaign {name} was running" for name in episode.campaigns)
            flagged.append(FlaggedDay(
                day.date, episode.severity, episode.p_value, episode.shape, episode.arm,
                day.units,
                {a: float(v) for a, v in zip(arms, excess[i].sum(axis=1), strict=True)},
                shares, episode.campaigns, tuple(reasons)))
    return tuple(sorted(flagged, key=lambda d: d.date))


def _status(episodes: Sequence[Episode]) -> str:
    if any(e.severity == "alert" and e.material for e in episodes):
        return "alert"
    return "watch" if episodes else "healthy"


def _unseen(counts: np.ndarray, planned: np.ndarray, arms: Sequence[str],
            config: DiagnosisConfig) -> Unseen | None:
    """The sensitivity caveat of a clean result, when inflows of ``unseen_share`` of an arm's
    traffic or more could pass the scan unflagged."""
    figures, baseline = inflow_sensitivity(counts, planned, arms, days=config.unseen_days,
                                           alpha=config.scan_alpha,
                                           max_window=config.max_window)
    share = {s.arm: s.share_of_arm_traffic for s in figures}
    if min(share.values()) <= config.unseen_share:
        return None
    units = {s.arm: s.units_per_day for s in figures}
    # Ties (symmetric weights) go to the first name, so the text does not depend on arm order.
    smallest = min(figures, key=lambda s: (round(s.units_per_day, 6), s.arm))
    text = (f"An inflow below about {smallest.units_per_day:,.0f} units a day "
            f"({100 * smallest.share_of_arm_traffic:.0f}% of {smallest.arm}'s traffic) held for "
            f"{config.unseen_days} days could have gone unseen: at about "
            f"{baseline:,.0f} units a day the experiment is too small to "
            "see moderate inflows.")
    return Unseen(config.unseen_days, units, share, text)


def _advice(status: str, episodes: Sequence[Episode], engagement: Mapping[str, Any],
            schedule: AllocationSchedule, unseen: Unseen | None, config: DiagnosisConfig
            ) -> tuple[str, ...]:
    advice: list[str] = []
    for episode in episodes:
        advice.append(episode.summary)
        advice.extend(a for a in episode.advice if a not in advice)
    if any(e.shape == "inflow" for e in episodes):
        advice.append(
            "Re-estimate the effect (reweight): by default it leaves out the cells of the "
            "episode, and the trimming bounds say how far the inflow could move the effect "
            "whatever the newcomers were like. A re-weighted estimate answers a different "
            "question (the effect on the population of the cells it keeps) and is not a "
            "randomised estimate.")
    inside = {(m, a, c.date) for e in episodes for m, per_arm in engagement.items()
              for a, changes in per_arm.items() for c in changes
              if e.start - dt.timedelta(days=1) <= c.date <= e.end + dt.timedelta(days=1)}
    outside = sorted({c.date for m, per_arm in engagement.items()
                      for a, changes in per_arm.items() for c in changes
                      if (m, a, c.date) not in inside})
    if outside:
        advice.append(
            "Outcome metrics of entering units moved against the other arms on "
            + ", ".join(d.isoformat() for d in outside)
            + " while the arm counts followed the plan: that is what a treatment or novelty "
            "effect looks like, not by itself a sign that a different population entered.")
    if schedule.change_dates():
        advice.append("The allocation changed on "
                      + ", ".join(d.isoformat() for d in schedule.change_dates())
                      + ": units that entered before and after a ramp step are not comparable "
                      "without accounting for the time of entry.")
    if status == "healthy":
        clean = (f"No sample ratio problem found: the arm counts follow the plan over the whole "
                 f"period, in every window of up to {config.max_window} days, from any start "
                 "day and in every entry source.")
        if unseen is not None:
            clean = ("No sample ratio problem found at the alert levels, but that does not show "
                     "that the arm counts follow the plan. " + unseen.text)
        advice.append(clean)
    return tuple(dict.fromkeys(advice))


def _flagged_day_dict(day: FlaggedDay) -> dict[str, Any]:
    return {
        "date": day.date.isoformat(),
        "severity": day.severity,
        "p_value": _num(day.p_value),
        "shape": day.shape,
        "arm": day.arm,
        "units": round(day.units, 1),
        "excess": _round(day.excess),
        "sources": [{"source": s.source, "share_of_excess": round(s.share_of_excess, 4),
                     "excess": round(s.excess, 1)} for s in day.sources],
        "campaigns": list(day.campaigns),
        "reasons": list(day.reasons),
    }


def _source_dict(source: SourceSummary) -> dict[str, Any]:
    return {"source": source.source, "observed": source.observed,
            "expected": _round(source.expected), "p_value": _num(source.p_value),
            "adjusted_p_value": _num(source.adjusted_p_value),
            "sequential_p_value": _num(source.sequential_p_value),
            "adjusted_sequential_p_value": _num(source.adjusted_sequential_p_value),
            "skewed": source.skewed}


def _num(value: float) -> float | None:
    return float(value) if value is not None and np.isfinite(value) else None


def _round(values: dict[str, float]) -> dict[str, float]:
    return {k: round(float(v), 2) for k, v in values.items()}


__all__ = ["Diagnosis", "DiagnosisConfig", "Finding", "FlaggedDay", "Unseen", "diagnose",
           "expected_by_source"]
