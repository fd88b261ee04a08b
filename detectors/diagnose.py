"""One call that runs every detector and assembles the diagnosis document.

``diagnose`` combines the whole-period SRM test (Pearson chi-square), the anytime-valid
Dirichlet-multinomial test (Lindon & Malek 2022), a Holm-controlled scan over windows of days,
per-source fits and the source x arm independence test, PELT changepoints on arm shares and on
entrant engagement, and turns them into a status, flagged days with the sources behind their
excess, and advice for the experiment owner.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np

from .allocation import AllocationSchedule
from .changepoints import (
    ChangepointConfig,
    EngagementChangepoint,
    ShareChangepoint,
    engagement_changepoints,
    share_changepoints,
)
from .data import UNATTRIBUTED, ObservationTable
from .errors import InputError
from .sequential import DEFAULT_CONCENTRATION, sequential_srm
from .srm import Window, daily_srm, overall_srm, scan_windows
from .stratify import (
    IndependenceTest,
    SourceShare,
    attribute_excess,
    excess_by_source,
    expected_by_source,
    independence_test,
    source_fits,
)

ORGANIC_SOURCES = frozenset({"organic", "direct", UNATTRIBUTED})


class KnownCampaign(Protocol):
    """What the diagnosis needs to know of a registered outreach campaign."""

    name: str
    source: str
    start: dt.date
    end: dt.date


@dataclass(frozen=True, slots=True)
class DiagnosisConfig:
    """Thresholds of the diagnosis.

    ``alpha``: alert threshold of the tests that are re-read every day over the whole period
    so far — the whole-period SRM and the per-source fits, both decided by their anytime-valid
    p-values (Lindon & Malek 2022) so that daily reading does not inflate false alarms; p <
    0.0005 is a common rule of thumb for SRM alarms (common practice, no source).
    ``scan_alpha``: family-wise level of the Holm-adjusted window scan at one look; the scan is
    what localises an inflow, so it gets the larger share of the false-alarm budget (with the
    defaults, A/A experiments read daily for 28 days alert well under 1% of the time; see
    benchmarks/RESULTS.md). ``watch_alpha``: level at which a finding is
    shown as ``watch`` without alerting. ``max_window``: longest run of days scanned.
    """

    alpha: float = 0.0005
    scan_alpha: float = 0.002
    watch_alpha: float = 0.05
    max_window: int = 7
    sequential_concentration: float = DEFAULT_CONCENTRATION
    changepoints: ChangepointConfig | None = None
    detect_changepoints: bool = True

    def __post_init__(self) -> None:
        if not 0 < self.alpha < self.watch_alpha < 1:
            raise InputError("need 0 < alpha < watch_alpha < 1", field="alpha")
        if not 0 < self.scan_alpha < self.watch_alpha:
            raise InputError("need 0 < scan_alpha < watch_alpha", field="scan_alpha")
        if not 1 <= self.max_window <= 31:
            raise InputError("max_window must be between 1 and 31 days", field="max_window")


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
    """A day inside a window whose mismatch passed the watch or alert level."""

    date: dt.date
    severity: str
    p_value: float
    day_p_value: float
    window_start: dt.date
    window_end: dt.date
    inflow_arm: str
    excess: dict[str, float]
    estimated_inflow: float
    sources: tuple[SourceShare, ...]
    campaigns: tuple[str, ...]
    reasons: tuple[str, ...]


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
    """Something worth an alert: ``kind`` and ``key`` identify it across diagnoses."""

    kind: str
    key: str
    severity: str
    title: str
    detail: dict[str, Any]


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

    @property
    def alert_days(self) -> tuple[dt.date, ...]:
        return tuple(d.date for d in self.flagged_days if d.severity == "alert")

    def findings(self) -> tuple[Finding, ...]:
        """Alert-worthy findings, each with a stable ``(kind, key)``."""
        found: list[Finding] = []
        if self.srm.mismatch:
            found.append(Finding(
                "srm", "overall", "alert",
                f"Sample ratio mismatch over the whole period (p = {self.srm.p_value:.2g})",
                {"p_value": self.srm.p_value, "sequential_p_value": self.srm.sequential_p_value,
                 "observed": self.srm.observed, "expected": _round(self.srm.expected)}))
        for day in self.flagged_days:
            if day.severity != "alert":
                continue
            top = day.sources[0].source if day.sources else "no single source"
            found.append(Finding(
                "skewed_day", day.date.isoformat(), "alert",
                f"{day.date.isoformat()}: {day.inflow_arm} got "
                f"{day.excess[day.inflow_arm]:+.0f} units over plan, mostly via {top}",
                _flagged_day_dict(day)))
        for source in self.sources:
            if source.skewed:
                found.append(Finding(
                    "skewed_source", source.source, "alert",
                    f"Source {source.source} does not follow the allocation "
                    f"(p = {source.p_value:.2g})", _source_dict(source)))
        for change in self.share_changepoints:
            found.append(Finding(
                "share_changepoint", change.date.isoformat(), "watch",
                f"Arm shares changed on {change.date.isoformat()}",
                {"date": change.date.isoformat(), "before": _round(change.before),
                 "after": _round(change.after)}))
        for metric, per_arm in self.engagement_changepoints.items():
            for arm, changes in per_arm.items():
                for change in changes:
                    found.append(Finding(
                        "engagement_changepoint", f"{metric}:{arm}:{change.date.isoformat()}",
                        "watch",
                        f"Entrant {metric} in {arm} shifted against the other arms on "
                        f"{change.date.isoformat()}",
                        {"metric": metric, "arm": arm, "date": change.date.isoformat(),
                         "before": change.before, "after": change.after}))
        return tuple(found)

    def to_dict(self) -> dict[str, Any]:
        """The diagnosis document of the HTTP contract (JSON-safe)."""
        return {
            "experiment": self.experiment,
            "as_of": self.as_of.isoformat() if self.as_of else None,
            "status": self.status,
            "srm": {
                "statistic": _num(self.srm.statistic),
                "p_value": _num(self.srm.p_value),
                "sequential_p_value": _num(self.srm.sequential_p_value),
                "observed": self.srm.observed,
                "expected": _round(self.srm.expected),
                "mismatch": self.srm.mismatch,
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
            "advice": list(self.advice),
            "thresholds": {"alpha": self.config.alpha, "scan_alpha": self.config.scan_alpha,
                           "watch_alpha": self.config.watch_alpha,
                           "max_window_days": self.config.max_window},
        }


def diagnose(table: ObservationTable, schedule: AllocationSchedule, *,
             config: DiagnosisConfig | None = None, experiment: str | None = None,
             as_of: dt.date | None = None,
             campaigns: Sequence[KnownCampaign] = ()) -> Diagnosis:
    """Run every detector on ``table`` against ``schedule``.

    ``as_of`` truncates the data to days up to that date (default: the last day with units).
    Known ``campaigns`` are named as the likely cause of an excess on their days and source.

    Example:
        >>> import pandas as pd
        >>> days = pd.date_range("2026-03-01", periods=14).strftime("%Y-%m-%d")
        >>> rows = pd.DataFrame({"date": list(days) * 2,
        ...     "arm": ["control"] * 14 + ["cards"] * 14, "source": "organic",
        ...     "entered": [5000] * 14 + [5000] * 9 + [5700] + [5000] * 4})
        >>> t = ObservationTable.from_frame(rows, ["control", "cards"])
        >>> d = diagnose(t, AllocationSchedule.constant(["control", "cards"]))
        >>> d.status, [x.isoformat() for x in d.alert_days]
        ('alert', ['2026-03-10'])
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

    daily = daily_srm(counts, planned)
    scan = scan_windows(counts, planned, max_window=config.max_window,
                        watch_alpha=config.watch_alpha)
    excess = excess_by_source(table.entered, planned)
    flagged = _flagged_days(scan.selected, daily.p_value, counts, planned, excess, table,
                            config, campaigns)

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

    status = _status(srm, flagged, source_summaries, share_changes, engagement, config)
    advice = _advice(status, srm, flagged, source_summaries, share_changes, engagement, arms,
                     schedule, config)
    return Diagnosis(experiment, dates[-1].item(), status, srm, flagged, source_summaries,
                     independence, share_changes, engagement, advice, config)


def _flagged_days(windows: Sequence[Window], day_p: np.ndarray, counts: np.ndarray,
                  planned: np.ndarray, excess: np.ndarray, table: ObservationTable,
                  config: DiagnosisConfig, campaigns: Sequence[KnownCampaign]
                  ) -> tuple[FlaggedDay, ...]:
    arms, sources, dates = table.arms, table.sources, table.dates
    expected = counts.sum(axis=1, keepdims=True) * planned
    flagged: list[FlaggedDay] = []
    for window in windows:
        span = slice(window.start, window.stop)
        window_excess = (counts[span] - expected[span]).sum(axis=0)
        relative = window_excess / np.maximum(expected[span].sum(axis=0), 1e-12)
        inflow_arm = int(np.argmax(relative))
        severity = "alert" if window.adjusted_p_value < config.scan_alpha else "watch"
        start, end = dates[window.start].item(), dates[window.stop - 1].item()
        for day in range(window.start, window.stop):
            date = dates[day].item()
            day_excess = counts[day] - expected[day]
            shares = attribute_excess(excess[day:day + 1], inflow_arm, sources)
            if day_excess[inflow_arm] <= 0 and window.length > 1:
                continue  # a day of the window that did not add to the inflow arm
            main = set(_main_sources({s.source: s.excess for s in shares}))
            hits = tuple(c.name for c in campaigns
                         if c.start <= date <= c.end and (not shares or c.source in main))
            inflow = max(day_excess[inflow_arm], 0.0) / (1.0 - planned[day, inflow_arm])
            reasons = [
                f"{arms[inflow_arm]} received {day_excess[inflow_arm]:+.0f} units against "
                f"plan ({100 * day_excess[inflow_arm] / max(expected[day, inflow_arm], 1):+.1f}%"
                f"), as if about {inflow:.0f} extra units had entered it alone",
                f"window {start.isoformat()}..{end.isoformat()}: chi-square p = "
                f"{window.p_value:.2g}, Holm-adjusted over all windows of "
                f"1-{config.max_window} days p = {window.adjusted_p_value:.2g}",
            ]
            if shares:
                top = shares[0]
                reasons.append(f"source {top.source} explains {100 * top.share_of_excess:.0f}% "
                               "of the excess")
            reasons.extend(f"campaign {name} was running on this day" for name in hits)
            flagged.append(FlaggedDay(
                date, severity, window.adjusted_p_value,
                float(np.nan_to_num(day_p[day], nan=1.0)), start, end, arms[inflow_arm],
                {a: float(v) for a, v in zip(arms, day_excess, strict=True)},
                float(max(day_excess[inflow_arm], 0.0) / (1.0 - planned[day, inflow_arm])),
                shares, hits, tuple(reasons)))
    return tuple(flagged)


def _status(srm: SrmSummary, flagged: Sequence[FlaggedDay], sources: Sequence[SourceSummary],
            share_changes: Sequence[ShareChangepoint], engagement: dict[str, Any],
            config: DiagnosisConfig) -> str:
    if srm.mismatch or any(d.severity == "alert" for d in flagged) \
            or any(s.skewed for s in sources):
        return "alert"
    if flagged or share_changes or engagement or srm.p_value < config.watch_alpha \
            or srm.sequential_p_value < config.watch_alpha \
            or any(s.adjusted_p_value < config.watch_alpha for s in sources):
        return "watch"
    return "healthy"


def _advice(status: str, srm: SrmSummary, flagged: Sequence[FlaggedDay],
            sources: Sequence[SourceSummary], share_changes: Sequence[ShareChangepoint],
            engagement: dict[str, Any], arms: Sequence[str], schedule: AllocationSchedule,
            config: DiagnosisConfig) -> tuple[str, ...]:
    advice: list[str] = []
    alert_days = [d for d in flagged if d.severity == "alert"]
    design_advice: list[str] = []
    all_campaigns: set[str] = set()
    if alert_days:
        by_arm: dict[str, list[FlaggedDay]] = {}
        for day in alert_days:
            by_arm.setdefault(day.inflow_arm, []).append(day)
        for arm, days in by_arm.items():
            inflow = sum(d.estimated_inflow for d in days)
            weight: dict[str, float] = {}
            for day in days:
                for share in day.sources:
                    weight[share.source] = weight.get(share.source, 0.0) + share.excess
            named = _main_sources(weight)
            dates = ", ".join(d.date.isoformat() for d in days)
            advice.append(
                f"About {inflow:,.0f} units entered {arm} beyond its planned share on {dates}, "
                f"mostly through {' and '.join(named) or 'an unlabelled source'}. Until this is "
                "explained, the experiment's effect estimate is not trustworthy.")
            campaigns = sorted({c for d in days for c in d.campaigns})
            all_campaigns.update(campaigns)
            if campaigns or any(s not in ORGANIC_SOURCES for s in named):
                design_advice.append(
                    "If an email, push or SMS campaign reached only some arms' users, fix the "
                    "design: send it to an equal share of every arm, or log who would have "
                    "received it in every arm and analyse by intent to treat.")
            else:
                design_advice.append(
                    "The excess arrived through organic or unlabelled traffic: look for a "
                    "partner link, a ramp step or an assignment change on those days, and label "
                    "entry sources so the next inflow can be traced.")
        # Each piece of design advice once, however many arms it concerns.
        advice.extend(dict.fromkeys(design_advice))
        if all_campaigns:
            advice.append("Registered campaigns on these days: "
                          f"{', '.join(sorted(all_campaigns))}.")
        advice.append(
            "Re-estimate the effect by entry cohort (reweight, by source or by source and "
            "window) to see how much the inflow moved it. A re-weighted estimate answers a "
            "different question (the effect on the population the target mix describes) and "
            "rests on the cohorts capturing why the inflow differs; it is not a randomised "
            "estimate.")
    if srm.mismatch and not alert_days:
        advice.append(
            "The whole-period arm counts do not match the plan (anytime-valid p = "
            f"{srm.sequential_p_value:.2g}) and no "
            "short window explains it: suspect a persistent cause (assignment or logging bug, "
            "bot filtering in one arm, a redirect) and do not read the effect until it is found.")
    skewed = [s.source for s in sources if s.skewed]
    if skewed:
        advice.append(
            f"Entry source {skewed[0]} does not follow the allocation: check how its units "
            "are assigned and whether its traffic targets one arm." if len(skewed) == 1 else
            f"Entry sources {', '.join(skewed)} do not follow the allocation: check how their "
            "units are assigned and whether their traffic targets one arm.")
    if share_changes:
        advice.append("Arm shares shifted on "
                      + ", ".join(c.date.isoformat() for c in share_changes)
                      + ": compare with ramp steps, releases and campaign dates.")
    if engagement:
        advice.append("Entrant engagement changed against the other arms on some days "
                      "(see the engagement changepoints): a different population may have "
                      "entered.")
    if schedule.change_dates():
        advice.append("The allocation changed on "
                      + ", ".join(d.isoformat() for d in schedule.change_dates())
                      + ": units that entered before and after a ramp step are not comparable "
                      "without accounting for the time of entry.")
    if status == "healthy":
        advice.append(
            f"No sample ratio problem found at the alert level p < {config.alpha:g}: arm counts "
            "follow the plan overall, in every window of up to "
            f"{config.max_window} days and in every entry source.")
    elif status == "watch" and not advice:
        advice.append("Some tests are below the watch level but none reaches the alert level; "
                      "keep the data flowing and check again tomorrow.")
    return tuple(advice)


def _main_sources(excess: dict[str, float], cover: float = 0.8) -> list[str]:
    """The fewest sources (largest first) that explain ``cover`` of the positive excess."""
    ranked = sorted(((s, v) for s, v in excess.items() if v > 0), key=lambda kv: -kv[1])
    total = sum(v for _, v in ranked)
    named: list[str] = []
    running = 0.0
    for source, value in ranked:
        named.append(source)
        running += value
        if running >= cover * total:
            break
    return named


def _flagged_day_dict(day: FlaggedDay) -> dict[str, Any]:
    return {
        "date": day.date.isoformat(),
        "severity": day.severity,
        "p_value": _num(day.p_value),
        "day_p_value": _num(day.day_p_value),
        "window": {"start": day.window_start.isoformat(), "end": day.window_end.isoformat()},
        "inflow_arm": day.inflow_arm,
        "excess": _round(day.excess),
        "estimated_inflow": round(day.estimated_inflow, 1),
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


__all__ = ["Diagnosis", "DiagnosisConfig", "Finding", "FlaggedDay", "diagnose",
           "expected_by_source"]
