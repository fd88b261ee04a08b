"""From detector evidence to episodes: where, which arm, which shape, how many units.

The decision that something is wrong is made by statistics that stay valid under daily reading
(window scan with its level spent over the experiment's life, the mixture change detector, the
anytime-valid whole-period and per-source tests). This module only *describes* what they found:

1. Localise. Days inside flagged windows, and days of share segments (PELT, Killick, Fearnhead
   & Eckley 2012) whose counts are clearly off plan, form runs of consecutive days (a gap of one
   day is bridged). A run becomes an episode only if some deciding evidence points at it. A
   source's whole-period test points at the segment of days its own counts left the plan on
   (:func:`source_segment`), so a campaign found only through its source is dated, not read as
   a skew from the first day.
2. Classify the shape by which quantity did *not* move (SRM cause taxonomy of Fabijan et al.,
   KDD 2019). Each arm's units are scaled by its planned weight (``c_k / p_k``, an estimate of
   the day's total) and compared with the same weekday outside any run. An inflow into arm k
   moves only arm k's level; a shortfall from arm k moves only arm k's level, down; a step of
   the split (a ramp applied late or early) moves the arms in opposite directions and leaves the
   day's total alone. The hypothesis whose untouched quantities moved least wins; a run that
   starts on the first day and holds most of the data is ``persistent``.
3. Count, with one formula per shape (see :mod:`detectors.episodes`), per day and per
   (day, source) cell.
"""

from __future__ import annotations

import datetime as dt
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from .changepoints import EngagementChangepoint, MultinomialShareCost, ShareChangepoint
from .data import UNATTRIBUTED, ObservationTable
from .episodes import (
    ALLOCATION_STEP,
    INFLOW,
    PERSISTENT,
    SHORTFALL,
    Episode,
    EpisodeCell,
    EpisodeDay,
    Evidence,
    MetricImpact,
    SourceContribution,
)
from .srm import Window, chisquare_rows
from .stratify import excess_by_source

ORGANIC_SOURCES = frozenset({"organic", "direct", UNATTRIBUTED})
# A share segment counts as off plan, for localisation only, below this chi-square p-value.
SEGMENT_LEVEL = 1e-4
# A run that starts on the first day and holds at least this share of the days is persistent.
PERSISTENT_COVER = 0.8
# A run is read as a steady skew inside some sources when they carry this share of its excess.
STEADY_SOURCE_SHARE = 0.5


class KnownCampaign(Protocol):
    """What the diagnosis needs to know of a registered outreach campaign."""

    name: str
    source: str
    start: dt.date
    end: dt.date


@dataclass(frozen=True, slots=True)
class Signal:
    """One piece of deciding evidence: a lifetime-valid p-value and the levels it is read at.

    ``days``: the day indices ``[first, last]`` it points at (``None``: the whole period).
    """

    kind: str
    key: str
    p_value: float
    alert_level: float
    watch_level: float
    days: tuple[int, int] | None
    title: str
    detail: Mapping[str, Any]
    source: str | None = None

    @property
    def severity(self) -> str | None:
        if self.p_value < self.alert_level:
            return "alert"
        if self.p_value < self.watch_level:
            return "watch"
        return None

    @property
    def strength(self) -> float:
        """p-value relative to the alert level: below 1 alerts; smaller is stronger."""
        return self.p_value / self.alert_level


@dataclass
class _Run:
    first: int
    last: int
    signals: list[Signal] = field(default_factory=list)
    whole_period: bool = False
    # Sources whose whole-period test found a skew spread over most of the experiment.
    steady_sources: list[str] = field(default_factory=list)


ImpactFunction = Callable[[tuple[EpisodeCell, ...], str], Mapping[str, MetricImpact]]


def window_signals(windows: Sequence[Window], dates: np.ndarray, alert_level: float,
                   watch_level: float, max_window: int) -> list[Signal]:
    """Flagged windows of the scan as signals."""
    signals = []
    for w in windows:
        first, last = dates[w.start].item(), dates[w.stop - 1].item()
        span = first.isoformat() if w.length == 1 else f"{first.isoformat()}..{last.isoformat()}"
        signals.append(Signal(
            "skewed_window", span, w.adjusted_p_value, alert_level, watch_level,
            (w.start, w.stop - 1),
            f"Arm counts off plan on {span} (window test, lifetime-adjusted p = "
            f"{w.adjusted_p_value:.2g})",
            {"start": first.isoformat(), "end": last.isoformat(), "p_value": w.adjusted_p_value,
             "raw_p_value": w.p_value, "statistic": w.statistic, "alert_level": alert_level,
             "test": f"Pearson chi-square over the window, level spent over windows of "
                     f"1-{max_window} days and the experiment's life"}))
    return signals


def find_episodes(table: ObservationTable, planned: np.ndarray, signals: Sequence[Signal], *,
                  share_changes: Sequence[ShareChangepoint] = (),
                  engagement: Mapping[str, Mapping[str, Sequence[EngagementChangepoint]]]
                  | None = None,
                  allocation_changes: Sequence[dt.date] = (),
                  campaigns: Sequence[KnownCampaign] = (),
                  impact: ImpactFunction | None = None,
                  materiality: float = 0.25) -> tuple[Episode, ...]:
    """Group ``signals`` (only those at watch level or beyond count) into episodes.

    Example:
        >>> import pandas as pd
        >>> days = pd.date_range("2026-03-01", periods=14).strftime("%Y-%m-%d")
        >>> rows = pd.DataFrame({"date": list(days) * 2, "arm": ["a"] * 14 + ["b"] * 14,
        ...     "source": "organic", "entered": [5000] * 14 + [5000] * 9 + [5700] + [5000] * 4})
        >>> t = ObservationTable.from_frame(rows, ["a", "b"])
        >>> s = Signal("skewed_window", "k", 1e-9, 0.002, 0.01, (9, 9), "t", {})
        >>> [(e.shape, e.arm, round(e.units)) for e in find_episodes(t, np.full((14, 2), .5), [s])]
        [('inflow', 'b', 700)]
    """
    counts = table.daily_totals.astype(float)
    n_days = counts.shape[0]
    live = [s for s in signals if s.severity is not None]
    if not live or n_days == 0:
        return ()
    expected = counts.sum(axis=1, keepdims=True) * planned
    candidate = np.zeros(n_days, dtype=bool)
    for signal in live:
        if signal.days is not None and signal.kind == "skewed_window":
            candidate[signal.days[0]:signal.days[1] + 1] = True
    candidate |= _off_plan_segments(counts, expected, table.dates, share_changes)
    runs = _runs(candidate)
    first_active = int(np.flatnonzero(counts.sum(axis=1) > 0)[0])
    _attach(runs, live, n_days, table, planned, first_active)
    runs = [r for r in runs if r.signals]
    runs = _merge_overlapping(runs)
    in_run = np.zeros(n_days, dtype=bool)
    for run in runs:
        in_run[run.first:run.last + 1] = True
    episodes = []
    for run in runs:
        episodes.append(_describe(run, table, counts, planned, expected, in_run, first_active,
                                  allocation_changes, campaigns, engagement or {}, impact,
                                  materiality))
    return tuple(episodes)


def _off_plan_segments(counts: np.ndarray, expected: np.ndarray, dates: np.ndarray,
                       share_changes: Sequence[ShareChangepoint]) -> np.ndarray:
    """Days of share segments whose summed counts are clearly off plan (localisation only)."""
    n_days = counts.shape[0]
    mask = np.zeros(n_days, dtype=bool)
    if not share_changes:
        return mask
    day_index = {d.item(): i for i, d in enumerate(dates)}
    bounds = [0, *sorted(day_index[c.date] for c in share_changes if c.date in day_index), n_days]
    starts, stops = np.array(bounds[:-1]), np.array(bounds[1:])
    cum_obs = np.vstack([np.zeros((1, counts.shape[1])), np.cumsum(counts, axis=0)])
    cum_exp = np.vstack([np.zeros((1, counts.shape[1])), np.cumsum(expected, axis=0)])
    _, p = chisquare_rows(cum_obs[stops] - cum_obs[starts], cum_exp[stops] - cum_exp[starts])
    for begin, stop, p_value in zip(starts, stops, np.nan_to_num(p, nan=1.0), strict=True):
        if p_value < SEGMENT_LEVEL:
            mask[begin:stop] = True
    return mask


def _runs(mask: np.ndarray, gap: int = 1) -> list[_Run]:
    """Runs of True days, bridging gaps of up to ``gap`` days."""
    days = np.flatnonzero(mask)
    if days.size == 0:
        return []
    breaks = np.flatnonzero(np.diff(days) > gap + 1)
    firsts = np.concatenate([[days[0]], days[breaks + 1]])
    lasts = np.concatenate([days[breaks], [days[-1]]])
    return [_Run(int(a), int(b)) for a, b in zip(firsts, lasts, strict=True)]


def _attach(runs: list[_Run], signals: Sequence[Signal], n_days: int,
            table: ObservationTable, planned: np.ndarray, first_active: int) -> None:
    """Give each signal to the run it points at, opening runs where none does. A source's
    whole-period signal points at the days its off-plan traffic is found on
    (:func:`source_segment`) unless they are most of the experiment."""
    for signal in sorted(signals, key=lambda s: s.days is None):
        days = signal.days
        steady_source = column = None
        if days is None:
            by_source = signal.source is not None and signal.source in table.sources
            column = (table.entered[:, :, table.sources.index(signal.source)] if by_source
                      else table.daily_totals).astype(float)
            if by_source:
                first, last = source_segment(column, planned)
                if _from_start(first, last, first_active, n_days):
                    steady_source = signal.source
                else:
                    days = (first, last)
        if days is not None:
            first, last = days
            touching = [r for r in runs if r.first <= last + 1 and first <= r.last + 1]
            if touching:
                best = max(touching, key=lambda r: min(r.last, last) - max(r.first, first))
                best.signals.append(signal)
                if signal.kind == "share_change":
                    # The change detector dates a long episode (a trickle) that short windows
                    # only see part of: the run reaches from its start to its peak.
                    best.first, best.last = min(best.first, first), max(best.last, last)
            else:
                runs.append(_Run(first, last, [signal]))
            continue
        # Whole-period evidence: the persistent run if any, else the run holding most of the
        # source's (or the arms') excess; with no run, the whole period.
        if not runs:
            runs.append(_Run(0, n_days - 1, [signal], whole_period=True,
                             steady_sources=[steady_source] if steady_source else []))
            continue
        assert column is not None
        shares = column / np.maximum(column.sum(axis=1, keepdims=True), 1.0)
        deviation = np.abs(shares - shares.mean(axis=0)).sum(axis=1) * column.sum(axis=1)
        best = max(runs, key=lambda r: deviation[r.first:r.last + 1].sum())
        best.signals.append(signal)
        if steady_source:
            best.steady_sources.append(steady_source)
    runs.sort(key=lambda r: r.first)


def _from_start(first: int, last: int, first_active: int, n_days: int) -> bool:
    """Days ``first..last`` start with the data (a day or two of noise aside) and hold most of
    it: what reads as steady from the first day."""
    return (first <= first_active + 2
            and (last - first_active + 1) >= PERSISTENT_COVER * (n_days - first_active))


def source_segment(column: np.ndarray, planned: np.ndarray) -> tuple[int, int]:
    """The days ``[first, last]`` on which one source's arm counts left the plan.

    ``column`` is the source's units per day and arm, ``planned`` the weights in force. Two
    multinomial models of the days the source has units on are compared
    (:class:`~detectors.changepoints.MultinomialShareCost`): one tilt of the plan over all of
    them, against the plan outside one segment and a tilt inside it. The segment is taken when
    it beats the single tilt by more than ``3 log(max(units, segments))`` (a BIC-like charge
    for its two ends, strict enough that a steady skew with noise stays whole); among equally
    good segments the shortest wins. Days without the source's units never extend the answer:
    a campaign's own source that exists on two days is dated to those two days.

    Example:
        >>> column = np.array([[50, 50]] * 5 + [[50, 350], [60, 340]] + [[50, 50]] * 5)
        >>> source_segment(column, np.full((12, 2), 0.5))
        (5, 6)
    """
    column = np.asarray(column, float)
    active = np.flatnonzero(column.sum(axis=1) > 0)
    if active.size == 0:
        return 0, column.shape[0] - 1
    first, last = int(active[0]), int(active[-1])
    cost = MultinomialShareCost().fit(MultinomialShareCost.signal_of(
        column[first:last + 1], planned[first:last + 1]))
    n = last - first + 1
    starts, ends = np.triu_indices(n + 1, k=1)  # every segment [start, end) of the active span
    with np.errstate(all="ignore"):
        tilted = (cost.plan_errors(0, starts) + cost.errors(starts, ends)
                  + cost.plan_errors(ends, n))
    one_tilt = float(cost.errors(np.array([0]), n)[0])
    best = float(tilted.min())
    penalty = 3.0 * math.log(max(float(column.sum()), float(starts.size), 2.0))
    if not one_tilt - best > penalty:
        return first, last
    near_best = np.flatnonzero(tilted <= best + 1e-9 * max(abs(best), 1.0))
    chosen = near_best[np.argmin(ends[near_best] - starts[near_best])]
    return first + int(starts[chosen]), first + int(ends[chosen]) - 1


def _merge_overlapping(runs: list[_Run]) -> list[_Run]:
    merged: list[_Run] = []
    for run in sorted(runs, key=lambda r: r.first):
        if merged and run.first <= merged[-1].last + 2:
            merged[-1].last = max(merged[-1].last, run.last)
            merged[-1].signals.extend(run.signals)
            merged[-1].whole_period |= run.whole_period
            merged[-1].steady_sources.extend(run.steady_sources)
        else:
            merged.append(run)
    return merged


def classify(counts: np.ndarray, planned: np.ndarray, first: int, last: int,
             in_any_run: np.ndarray, *, near_allocation_change: bool = False
             ) -> tuple[str, int]:
    """Shape and arm of the run ``[first, last]`` (day indices) from level jumps.

    ``counts`` and ``planned`` are ``(days, arms)``; ``in_any_run`` marks days of any episode
    (they are never used as the baseline). Returns ``(shape, arm index)``; ``persistent`` when no
    day outside the runs is left to compare with. A step of the split is considered only where
    one is plausible: within three days of a declared allocation change, or when the run lasts
    a week or reaches the last day (a split that moved for a day or two and came back is an
    inflow or a shortfall).

    Example:
        >>> c = np.full((21, 2), 1000.0); c[10:12, 1] = 1300            # arm 1 got extra units
        >>> mask = np.zeros(21, bool); mask[10:12] = True
        >>> classify(c, np.full((21, 2), .5), 10, 11, mask)
        ('inflow', 1)
        >>> c = np.full((21, 2), 1000.0); c[10:12, 0] = 700             # arm 0 lost units
        >>> classify(c, np.full((21, 2), .5), 10, 11, mask)
        ('shortfall', 0)
        >>> c = np.full((21, 2), 1000.0); c[10:12] = [1150, 850]         # the split moved
        >>> classify(c, np.full((21, 2), .5), 10, 11, mask, near_allocation_change=True)
        ('allocation_step', 0)
    """
    span = np.arange(first, last + 1)
    baseline = _baseline_days(span, in_any_run, counts.shape[0])
    excess = (counts[span] - counts[span].sum(axis=1, keepdims=True) * planned[span]).sum(axis=0)
    relative = excess / np.maximum((counts[span].sum(axis=1, keepdims=True)
                                    * planned[span]).sum(axis=0), 1e-12)
    if baseline.size == 0:
        return PERSISTENT, int(np.argmax(relative))
    implied = counts / planned  # each arm's estimate of the day's total
    totals = counts.sum(axis=1)
    # Traffic that grows (or shrinks) moves every level alike: the trend of the baseline days'
    # log totals, carried from their mean day to the span's, is taken out of every jump.
    trend = _trend(baseline, np.log(np.maximum(totals[baseline], 1.0))) \
        * (span.mean() - baseline.mean())
    jump = np.log(np.maximum(implied[span].mean(axis=0), 1e-9)
                  / np.maximum(implied[baseline].mean(axis=0), 1e-9)) - trend
    total_jump = abs(float(np.log(max(totals[span].mean(), 1e-9)
                                  / max(totals[baseline].mean(), 1e-9))) - trend)
    n_arms = counts.shape[1]
    # An inflow into (or shortfall from) arm k leaves every other arm's level alone.
    untouched = np.array([np.abs(np.delete(jump, k)).mean() for k in range(n_arms)])
    arm = int(np.argmin(untouched))
    step_plausible = (near_allocation_change or len(span) >= 7
                      or (last == counts.shape[0] - 1 and len(span) >= 3))
    if step_plausible and total_jump * (0.5 if near_allocation_change else 1.0) < untouched[arm]:
        return ALLOCATION_STEP, int(np.argmax(relative))
    return (INFLOW if excess[arm] > 0 else SHORTFALL), arm


def _trend(days: np.ndarray, log_totals: np.ndarray) -> float:
    """Daily slope of the log totals, fitted with one level per weekday so that the weekly
    cycle does not pass for growth; 0 with fewer than two weeks of baseline (too little to
    tell a trend from the cycle)."""
    weekday = days % 7
    if days.size < 14 or np.bincount(weekday, minlength=7).min() < 2:
        return 0.0
    design = np.column_stack([days.astype(float), np.eye(7)[weekday]])
    coefficients = np.linalg.lstsq(design, log_totals, rcond=None)[0]
    return float(coefficients[0])


def _baseline_days(span: np.ndarray, in_any_run: np.ndarray, n_days: int) -> np.ndarray:
    """Days outside every run to compare ``span`` with: the same weekdays one and two weeks
    away when each span day has one, else any such day within two weeks."""
    free = ~in_any_run
    matched = []
    for offset in (-14, -7, 7, 14):
        days = span + offset
        ok = (days >= 0) & (days < n_days)
        ok[ok] &= free[days[ok]]
        matched.append(np.where(ok, days, -1))
    matched_days = np.stack(matched)
    if (matched_days >= 0).any(axis=0).all():
        return np.unique(matched_days[matched_days >= 0])
    near = np.arange(max(0, span[0] - 14), min(n_days, span[-1] + 15))
    near = near[free[near]]
    if near.size:
        return near
    return np.flatnonzero(free)


def episode_units(entered: np.ndarray, planned: np.ndarray, arm: int, shape: str) -> np.ndarray:
    """Signed units per (day, source) of ``arm`` under the shape's formula.

    ``entered`` is ``(days, arms, sources)``, ``planned`` ``(days, arms)``. Inflow and
    shortfall: ``(c_k - p_k n) / (1 - p_k)``, the units that would have to leave (or join) arm
    ``k`` alone for the counts to match the plan; step and persistent: ``c_k - p_k n``, units
    moved into arm ``k`` from the others with each day's total taken as right.

    Example:
        >>> e = np.array([[[5000], [5700]]]); p = np.full((1, 2), .5)
        >>> float(episode_units(e, p, 1, "inflow")[0, 0]), float(episode_units(e, p, 1,
        ...     "allocation_step")[0, 0])
        (700.0, 350.0)
    """
    entered = np.asarray(entered, dtype=float)
    weight = planned[:, arm][:, None]
    excess = entered[:, arm, :] - entered.sum(axis=1) * weight
    if shape in (INFLOW, SHORTFALL):
        return excess / (1.0 - weight)
    return excess


def _describe(run: _Run, table: ObservationTable, counts: np.ndarray, planned: np.ndarray,
              expected: np.ndarray, in_run: np.ndarray, first_active: int,
              allocation_changes: Sequence[dt.date], campaigns: Sequence[KnownCampaign],
              engagement: Mapping[str, Mapping[str, Sequence[EngagementChangepoint]]],
              impact: ImpactFunction | None, materiality: float) -> Episode:
    arms, dates, sources = table.arms, table.dates, table.sources
    n_days = counts.shape[0]
    first, last = run.first, run.last
    start, end = dates[first].item(), dates[last].item()
    near_change = any(abs((c - start).days) <= 3 for c in allocation_changes)
    persistent = run.whole_period or _from_start(first, last, first_active, n_days)
    # Found only by per-source tests: the skew lives in those sources, which the arms' totals
    # may not show (the other sources dilute it), so they are what is counted and described.
    skewed_sources = sorted({s.source for s in run.signals if s.source in sources})
    source_only = bool(skewed_sources) and all(s.kind == "skewed_source" for s in run.signals)
    scope = skewed_sources if source_only else []
    # A steady skew inside some sources that also tips the arms' totals: when those sources
    # carry most of the excess of a run that starts with the data, the run is that skew seen
    # through the totals (dated by whatever crossed first), not an event of its own.
    steady = sorted(set(run.steady_sources) & set(sources))
    # Only a run that itself starts with the data: a trickle that starts later is dated by its
    # run even when its source's test cannot tell it from a steady skew.
    if steady and not persistent and first <= first_active + 2:
        chosen = [sources.index(s) for s in steady]
        if (_excess_share(table.entered[first:last + 1], planned[first:last + 1], chosen)
                >= STEADY_SOURCE_SHARE
                and _carries_on(table.entered[first_active:], planned[first_active:], chosen,
                                first - first_active, last - first_active)):
            persistent, scope = True, steady
    in_scope = np.isin(np.asarray(sources, dtype=object), scope) if scope \
        else np.ones(len(sources), dtype=bool)
    # Observed and expected units per arm over the episode, for the shapes told by weights.
    arm_totals: tuple[np.ndarray, np.ndarray] | None = None
    if persistent:
        # Steady from the first day: the episode is the whole period so far.
        first, last = first_active, n_days - 1
        start, end = dates[first].item(), dates[last].item()
        arm_totals = _arm_totals(table.entered[first:last + 1][:, :, in_scope].sum(axis=2),
                                 planned[first:last + 1])
        observed, planned_units = arm_totals
        relative = (observed - planned_units) / np.maximum(planned_units, 1e-12)
        shape, arm = PERSISTENT, int(np.argmax(relative))
    else:
        shape, arm = classify(counts, planned, first, last, in_run,
                              near_allocation_change=near_change)
    span = slice(first, last + 1)
    if shape == ALLOCATION_STEP:
        arm_totals = _arm_totals(counts[span], planned[span])
    cell_units = episode_units(table.entered[span], planned[span], arm, shape) * in_scope
    daily_units = cell_units.sum(axis=1)
    total = float(daily_units.sum())
    daily = tuple(EpisodeDay(dates[first + i].item(), float(u)) for i, u in enumerate(daily_units))
    nonzero = np.argwhere(np.abs(cell_units) >= 0.05)
    cells = tuple(EpisodeCell(dates[first + d].item(), sources[s], float(cell_units[d, s]))
                  for d, s in nonzero)
    by_source = cell_units.sum(axis=0)
    aligned = np.clip(by_source * np.sign(total or 1.0), 0.0, None)
    contributions: tuple[SourceContribution, ...] = ()
    if aligned.sum() > 0:
        order = np.argsort(-aligned, kind="stable")
        contributions = tuple(SourceContribution(sources[i], float(aligned[i] / aligned.sum()),
                                                 float(by_source[i]))
                              for i in order if aligned[i] > 0)
    main = _main_sources(contributions)
    named_campaigns = tuple(c.name for c in campaigns
                            if c.start <= end and start <= c.end
                            and (not main or c.source in main))
    signals = sorted(run.signals, key=lambda s: s.strength)
    deciding = signals[0]
    severity = "alert" if any(s.severity == "alert" for s in signals) else "watch"
    observed_w = planned_w = None
    if arm_totals is not None:
        observed, planned_units = arm_totals
        units_in = max(float(observed.sum()), 1.0)
        observed_w = dict(zip(arms, (observed / units_in).tolist(), strict=True))
        planned_w = dict(zip(arms, (planned_units / units_in).tolist(), strict=True))
    through = tuple(scope) if scope and shape == PERSISTENT else ()
    impacts: Mapping[str, MetricImpact] = impact(cells, arms[arm]) if impact else {}
    measured = [i.in_se for i in impacts.values() if i.in_se is not None]
    material = not measured or max(measured) >= materiality
    context = _context(engagement, start, end)
    arm_name = arms[arm]
    summary = _summary(shape, arm_name, start, end, total, contributions, named_campaigns,
                       observed_w, planned_w, table.arms, through)
    meaning = _units_meaning(shape, arm_name, len(arms))
    evidence = tuple(Evidence(s.kind, s.key, s.severity or "watch", s.title, dict(s.detail))
                     for s in signals)
    return Episode(
        shape=shape, arm=arm_name, start=start, end=end, units=total, daily=daily, cells=cells,
        sources=contributions, campaigns=named_campaigns,
        severity=severity if material else "watch", material=material,
        p_value=float(deciding.p_value), detected_by=tuple(dict.fromkeys(s.kind for s in signals)),
        summary=summary, units_meaning=meaning,
        advice=shape_advice(shape, arm_name, main, named_campaigns, observed_w, planned_w,
                            through),
        # The episode's weights are the arms' shares; a skew within some sources gives its
        # own shares in the summary and advice only.
        evidence=evidence, impact=impacts, observed_weights=None if through else observed_w,
        planned_weights=None if through else planned_w, context=context,
        ongoing=last == n_days - 1,
        alert_level=deciding.alert_level)


def _arm_totals(units: np.ndarray, planned: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Observed and planned units per arm, summed over the days of ``units`` (days, arms)."""
    units = np.asarray(units, dtype=float)
    return units.sum(axis=0), (units.sum(axis=1, keepdims=True) * planned).sum(axis=0)


def _excess_share(entered: np.ndarray, planned: np.ndarray, chosen: Sequence[int]) -> float:
    """Share of the span's absolute excess (summed over days, per arm and source) that the
    ``chosen`` sources carry. ``entered`` is ``(days, arms, sources)``."""
    by_source = np.abs(excess_by_source(np.asarray(entered, float), planned).sum(axis=0)
                       ).sum(axis=0)
    total = float(by_source.sum())
    return float(by_source[list(chosen)].sum()) / total if total > 0 else 0.0


def _carries_on(entered: np.ndarray, planned: np.ndarray, chosen: Sequence[int], first: int,
                last: int) -> bool:
    """Whether the ``chosen`` sources' daily excess outside days ``first..last`` is at least
    half of that inside, in the same direction: a steady skew, not a burst that the run holds.
    """
    excess = excess_by_source(np.asarray(entered, float)[:, :, list(chosen)], planned
                              ).sum(axis=2)
    inside = np.zeros(excess.shape[0], dtype=bool)
    inside[first:last + 1] = True
    if inside.all() or not inside.any():
        return False
    per_day_in = excess[inside].mean(axis=0)
    per_day_out = excess[~inside].mean(axis=0)
    scale = float(per_day_in @ per_day_in)
    return scale > 0 and float(per_day_out @ per_day_in) >= 0.5 * scale


def _main_sources(contributions: Sequence[SourceContribution], cover: float = 0.8) -> list[str]:
    """The fewest sources (largest first) that explain ``cover`` of the episode's units."""
    named: list[str] = []
    running = 0.0
    for c in contributions:
        named.append(c.source)
        running += c.share
        if running >= cover:
            break
    return named


def _context(engagement: Mapping[str, Mapping[str, Sequence[EngagementChangepoint]]],
             start: dt.date, end: dt.date) -> tuple[str, ...]:
    """Outcome changepoints within a day of the episode: context, never evidence."""
    slack = dt.timedelta(days=1)
    notes = []
    for metric, per_arm in engagement.items():
        for arm, changes in per_arm.items():
            for change in changes:
                if start - slack <= change.date <= end + slack:
                    notes.append(
                        f"{metric} of the units entering {arm} moved against the other arms on "
                        f"{change.date.isoformat()} (gap {change.before:+,.3g} to "
                        f"{change.after:+,.3g}), coinciding with this episode: the units that "
                        "entered during it may differ from the usual entrants.")
    return tuple(notes)


def _weights(weights: Mapping[str, float] | None, arms: Sequence[str]) -> str:
    """``cards 0.55, control 0.45``: by arm name, so that the text does not depend on the
    order in which the arms were declared."""
    if not weights:
        return ""
    return ", ".join(f"{a} {weights[a]:.2f}" for a in sorted(arms))


def _span(start: dt.date, end: dt.date) -> str:
    return (f"on {start.isoformat()}" if start == end
            else f"from {start.isoformat()} to {end.isoformat()}")


def _summary(shape: str, arm: str, start: dt.date, end: dt.date, units: float,
             sources: Sequence[SourceContribution], campaigns: Sequence[str],
             observed: Mapping[str, float] | None, planned: Mapping[str, float] | None,
             arms: Sequence[str], through: Sequence[str] = ()) -> str:
    top = sources[0] if sources else None
    via = (f", {100 * top.share:.0f}% of it through {top.source}" if top else "")
    explained = (f"; explained by the registered campaign {' and '.join(campaigns)}"
                 if campaigns else "")
    if shape == INFLOW:
        return (f"Inflow into {arm} {_span(start, end)}: about {units:+,.0f} units over plan"
                f"{via}{explained}.")
    if shape == SHORTFALL:
        running = (f"; the registered campaign {' and '.join(campaigns)} ran then but does not "
                   "explain units going missing" if campaigns else "")
        return (f"Shortfall in {arm} {_span(start, end)}: about {abs(units):,.0f} units "
                f"missing against plan{via}{running}.")
    if shape == ALLOCATION_STEP:
        return (f"From {start.isoformat()}"
                + (f" to {end.isoformat()}" if end != start else "")
                + f" the arms' shares follow about {_weights(observed, arms)} instead of the "
                f"declared {_weights(planned, arms)} (about {units:+,.0f} units into {arm} "
                "taken from the other arms).")
    whose = (f"units entering through {' and '.join(through)} are split at about"
             if through else "the arms' shares sit at about")
    return (f"From the first day {whose} {_weights(observed, arms)} instead of the declared "
            f"{_weights(planned, arms)} (about {units:+,.0f} units into {arm} so far).")


def _units_meaning(shape: str, arm: str, n_arms: int) -> str:
    others = "the other arm" if n_arms == 2 else "the other arms"
    if shape in (INFLOW, SHORTFALL):
        return (f"Units over (+) or under (-) plan in {arm}, judged against {others}: how many "
                f"would have to leave (or join) {arm} alone for the day's counts to match the "
                "plan.")
    note = (" Several arms move together: the figure is what the named arm gained; the other "
            "arms lost it between them in proportion to their deviations." if n_arms > 2 else "")
    return (f"Units that went to {arm} instead of {others}, taking each day's total as right."
            + note)


CAMPAIGN_DESIGN_ADVICE = (
    "If an email, push or SMS campaign reached only some arms' users, fix the design: send it "
    "to an equal share of every arm, or log who would have received it in every arm and analyse "
    "by intent to treat.")


def shape_advice(shape: str, arm: str, main_sources: Sequence[str], campaigns: Sequence[str],
                 observed: Mapping[str, float] | None, planned: Mapping[str, float] | None,
                 through: Sequence[str] = ()) -> tuple[str, ...]:
    """What to check for each shape, after the SRM cause taxonomy of Fabijan et al. (KDD 2019).
    ``through``: for a persistent skew seen only within some entry sources, those sources."""
    labelled = [s for s in main_sources if s not in ORGANIC_SOURCES]
    if shape == INFLOW:
        advice = [f"Until the extra units in {arm} are explained, the effect estimate is not "
                  "trustworthy; compare the naive, honest and bounded estimates (reweight)."]
        if campaigns or labelled:
            advice.append(CAMPAIGN_DESIGN_ADVICE)
        else:
            advice.append("The units arrived through organic or unlabelled traffic: look for a "
                          "partner link, a deep link or a redirect that points only at "
                          f"{arm}, and label entry sources so the next inflow can be traced.")
        return tuple(advice)
    if shape == SHORTFALL:
        return (f"Units went missing from {arm}: look for what drops units in that arm only "
                "(crashes or slow loading of its experience, lost exposure logging, bot or "
                "fraud filtering, redirects that lose units). The units that remain are a "
                "selected group, so the effect estimate is biased until the loss is explained.",)
    if shape == ALLOCATION_STEP:
        return ("The shares changed to other weights than the declared schedule: compare with "
                "the ramp history (a step applied late or early). If the weights changed on "
                "purpose, add the step to the allocation schedule; units that entered before "
                "and after a ramp step are not comparable without accounting for the time of "
                "entry.",)
    if through:
        named = " and ".join(through)
        return (f"Units entering through {named} are assigned or logged unevenly from the "
                f"start: observed about {_weights(observed, list(observed or {}))} against the "
                f"declared {_weights(planned, list(planned or {}))} within that traffic. Check "
                "what is particular to it: a landing page, app version or redirect that assigns, "
                "exposes or logs only some arms, or filtering that treats its units "
                "differently; do not read the effect until the cause is found.",)
    return ("The declared weights look wrong or units are assigned or logged unevenly from the "
            f"start: observed about {_weights(observed, list(observed or {}))} against the "
            f"declared {_weights(planned, list(planned or {}))}. Check the assignment "
            "configuration and hashing, the exposure logging trigger and bot filtering; do not "
            "read the effect until the cause is found.",)
