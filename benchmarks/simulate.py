"""Seeded simulator of daily experiment traffic, with optional inflows into one arm.

The simulated world (invented; see the project's demo scenario for the setting):

* Units arrive as Poisson counts per day and entry source around ``daily_units`` a day, with a
  weekly pattern (busier weekends) and steady growth; each source carries a fixed share.
* Each unit is assigned to an arm by the allocation in force on its day (multinomial; binomial
  for two arms). Ramps are allocation steps from a given day on.
* Each source has its own engagement: a per-unit metric, normal with a source mean and spread.
  Arms other than the reference multiply every cohort's mean by ``1 + lift`` (the within-cohort
  effect, optionally scaled per source so that effects differ between cohorts).
* An :class:`Inflow` sends extra units into one arm only, on 1-3 consecutive days, sized as a
  fraction of that arm's expected daily traffic. They arrive under their own source label or,
  unlabelled, mixed into a host source, and are less engaged than the host's usual units.

Metric sufficient statistics (n, sum, sum of squares) are drawn exactly for normal units without
materialising them: ``sum ~ N(n mu, n sd^2)`` and, independently, the within-cell sum of squared
deviations ``~ sd^2 chi2(n - 1)`` (Cochran's theorem), so ``sum_sq = SS + sum^2 / n``.
Everything is vectorised over (day, arm, source).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field, replace

import numpy as np
import pandas as pd

from detectors.allocation import AllocationSchedule
from detectors.data import ObservationTable


@dataclass(frozen=True, slots=True)
class SourceProfile:
    """One entry source: its share of baseline traffic and its units' engagement."""

    name: str
    share: float
    mean: float
    sd: float
    lift_scale: float = 1.0


@dataclass(frozen=True, slots=True)
class Inflow:
    """Extra units sent into arm ``arm`` on days ``start .. start + length - 1``.

    ``size`` is the fraction of the arm's expected daily traffic added on each of those days.
    ``label`` is the inflow's own source name; ``None`` means it arrives under ``host``.
    ``engagement`` scales the host source's metric mean for the inflow's units.
    """

    arm: int
    start: int
    length: int
    size: float
    label: str | None = None
    host: str = "organic"
    engagement: float = 0.4

    def days(self, n_days: int) -> np.ndarray:
        mask = np.zeros(n_days, dtype=bool)
        mask[self.start:self.start + self.length] = True
        return mask


# Engagement per source loosely follows the demo scenario (routes saved per unit).
DEFAULT_SOURCES: tuple[SourceProfile, ...] = (
    SourceProfile("organic", 0.62, 2.4, 2.0, 1.0),
    SourceProfile("newsletter", 0.12, 1.5, 1.6, 1.4),
    SourceProfile("push", 0.14, 1.9, 1.8, 0.7),
    SourceProfile("paid_search", 0.12, 1.2, 1.4, 1.2),
)

# Extra invented source names for wide scenarios (the speed benchmark uses twelve).
EXTRA_SOURCE_NAMES = ("referral", "social", "partner_blog", "app_store", "sms", "affiliate",
                      "video", "podcast")

# Each further metric is the first one rescaled (e.g. minutes on a route, photos shared).
METRIC_SCALES = (1.0, 3.1, 0.4, 1.7, 0.8)


def many_sources(count: int) -> tuple[SourceProfile, ...]:
    """``count`` sources: the default four, then invented extras with decreasing shares."""
    names = [s.name for s in DEFAULT_SOURCES] + list(EXTRA_SOURCE_NAMES)
    if not 1 <= count <= len(names):
        raise ValueError(f"between 1 and {len(names)} sources")
    raw = np.array([0.45, 0.12, 0.1, 0.08] + [0.05] * 8)[:count]
    shares = raw / raw.sum()
    means = np.array([2.4, 1.5, 1.9, 1.2, 2.0, 1.1, 2.6, 1.8, 0.9, 1.3, 1.6, 2.2])[:count]
    return tuple(SourceProfile(name, float(share), float(mean), 1.5 + 0.1 * i,
                               1.0 + 0.1 * ((i % 5) - 2))
                 for i, (name, share, mean) in enumerate(zip(names, shares, means,
                                                             strict=False)))


@dataclass(frozen=True, slots=True)
class Scenario:
    """Everything that defines a simulated experiment except the random seed."""

    n_days: int = 28
    arms: tuple[str, ...] = ("control", "cards")
    # Allocation steps as (first day index, weights).
    allocation: tuple[tuple[int, tuple[float, ...]], ...] = ((0, (0.5, 0.5)),)
    daily_units: float = 10_000.0
    weekly_amplitude: float = 0.15
    growth_per_day: float = 0.004
    sources: tuple[SourceProfile, ...] = DEFAULT_SOURCES
    metrics: tuple[str, ...] = ("routes_saved",)
    # Relative lift of each arm's cohort means over the reference arm (first entry is 0).
    lifts: tuple[float, ...] = (0.0, 0.05)
    inflows: tuple[Inflow, ...] = ()
    start_date: dt.date = dt.date(2026, 3, 2)

    def with_inflows(self, *inflows: Inflow) -> Scenario:
        return replace(self, inflows=tuple(inflows))

    def schedule(self) -> AllocationSchedule:
        steps = [{"from": self.start_date + dt.timedelta(days=day), "weights": list(w)}
                 for day, w in self.allocation]
        return AllocationSchedule.from_steps(self.arms, steps)

    def planned(self) -> np.ndarray:
        """Planned weights per day, ``(days, arms)``."""
        weights = np.zeros((self.n_days, len(self.arms)))
        for day, w in sorted(self.allocation):
            weights[day:] = w
        return weights

    def expected_daily_units(self) -> np.ndarray:
        """Poisson rate of baseline arrivals per day (all arms together)."""
        days = np.arange(self.n_days)
        weekday = (self.start_date.weekday() + days) % 7
        weekly = 1.0 + self.weekly_amplitude * np.cos(2 * np.pi * (weekday - 5.5) / 7)
        shape = weekly * (1.0 + self.growth_per_day) ** days
        return self.daily_units * shape / shape.mean()


@dataclass(frozen=True)
class Simulation:
    """A simulated experiment and the truth behind it."""

    scenario: Scenario
    table: ObservationTable
    schedule: AllocationSchedule
    inflow_days: np.ndarray           # (days,) bool: any inflow on the day
    inflow_units: np.ndarray          # (days, arms) extra units sent by inflows
    baseline_entered: np.ndarray      # (days, arms, sources) units without the inflows
    cohort_effects: dict[str, np.ndarray] = field(default_factory=dict)  # metric -> (arms, src)

    @property
    def dates(self) -> list[dt.date]:
        return self.table.date_list()

    def true_effect(self, metric: str, arm: int, reference: int = 0) -> float:
        """Within-cohort mean difference of ``arm`` over ``reference``, averaged with the
        reference arm's realised source mix (the estimand of re-weighting to the reference arm:
        the inflow's units are absent from it, and source effects differ)."""
        counts = self.baseline_entered[:, reference, :].sum(axis=0).astype(float)
        weights = counts / counts.sum()
        effects = self.cohort_effects[metric]
        return float(weights @ (effects[arm] - effects[reference]))

    def to_frame(self) -> pd.DataFrame:
        """Rows of the data contract (flat CSV layout); cells without units are left out."""
        t = self.table
        days, arms, sources = np.nonzero(t.entered)
        frame = pd.DataFrame({
            "date": pd.Index(t.dates[days]).strftime("%Y-%m-%d"),
            "arm": np.asarray(t.arms, dtype=object)[arms],
            "source": np.asarray(t.sources, dtype=object)[sources],
            "entered": t.entered[days, arms, sources],
        })
        for name, cube in t.metrics.items():
            cells = cube[days, arms, sources]
            frame[f"{name}.n"] = cells[:, 0].astype(np.int64)
            frame[f"{name}.sum"] = cells[:, 1]
            frame[f"{name}.sum_sq"] = cells[:, 2]
        return frame

    def to_records(self) -> list[dict[str, object]]:
        """Rows of the data contract as JSON objects (nested ``metrics``)."""
        frame = self.to_frame()
        names = list(self.table.metrics)
        records: list[dict[str, object]] = []
        for row in frame.to_dict("records"):
            records.append({
                "date": row["date"], "arm": row["arm"], "source": row["source"],
                "entered": int(row["entered"]),
                "metrics": {m: {"n": int(row[f"{m}.n"]), "sum": float(row[f"{m}.sum"]),
                                "sum_sq": float(row[f"{m}.sum_sq"])} for m in names},
            })
        return records


def simulate(scenario: Scenario, rng: np.random.Generator) -> Simulation:
    """Draw one experiment of ``scenario``.

    Example:
        >>> sim = simulate(Scenario(), np.random.default_rng(1))
        >>> sim.table.entered.shape
        (28, 2, 4)
    """
    n_days, n_arms = scenario.n_days, len(scenario.arms)
    planned = scenario.planned()
    base_names = [s.name for s in scenario.sources]
    labels = sorted({i.label for i in scenario.inflows if i.label and i.label not in base_names})
    names = sorted(base_names + labels)
    index = {name: i for i, name in enumerate(names)}
    n_sources = len(names)
    profile_of = {s.name: s for s in scenario.sources}

    rate = scenario.expected_daily_units()
    base_cols = np.array([index[n] for n in base_names])
    shares = np.array([s.share for s in scenario.sources]) / sum(s.share for s in scenario.sources)
    arrivals = rng.poisson(rate[:, None] * shares[None, :])                   # (days, base src)
    assigned = rng.multinomial(arrivals, planned[:, None, :])                 # (days, src, arms)
    baseline = np.zeros((n_days, n_arms, n_sources), dtype=np.int64)
    baseline[:, :, base_cols] = assigned.transpose(0, 2, 1)

    inflow = np.zeros_like(baseline)
    inflow_units = np.zeros((n_days, n_arms), dtype=np.int64)
    inflow_days = np.zeros(n_days, dtype=bool)
    inflow_mean = np.zeros((n_days, n_arms, n_sources))   # metric mean (scale 1) of inflow units
    inflow_sd = np.ones((n_days, n_arms, n_sources))
    for spec in scenario.inflows:
        days = spec.days(n_days)
        inflow_days |= days
        extra = np.zeros(n_days, dtype=np.int64)
        extra[days] = rng.poisson(spec.size * rate[days] * planned[days, spec.arm])
        column = index[spec.label or spec.host]
        inflow[:, spec.arm, column] += extra
        inflow_units[:, spec.arm] += extra
        host = profile_of[spec.host]
        inflow_mean[days, spec.arm, column] = host.mean * spec.engagement
        inflow_sd[days, spec.arm, column] = host.sd * max(spec.engagement, 0.5)

    # Cohort means and spreads for baseline units, (arms, sources) at metric scale 1.
    means = np.zeros((n_arms, n_sources))
    sds = np.ones((n_arms, n_sources))
    lift = np.zeros((n_arms, n_sources))
    lifts = np.asarray(scenario.lifts, dtype=float)
    for s in scenario.sources:
        lift[:, index[s.name]] = lifts * s.lift_scale
        means[:, index[s.name]] = s.mean * (1.0 + lift[:, index[s.name]])
        sds[:, index[s.name]] = s.sd
    # Inflow units get the same relative lift as their host source.
    inflow_lift = np.zeros((n_arms, n_sources))
    for spec in scenario.inflows:
        inflow_lift[:, index[spec.label or spec.host]] = lifts * profile_of[spec.host].lift_scale

    metrics: dict[str, np.ndarray] = {}
    effects: dict[str, np.ndarray] = {}
    for k, name in enumerate(scenario.metrics):
        scale = METRIC_SCALES[k % len(METRIC_SCALES)]
        cube = _normal_sufficient_stats(rng, baseline, scale * means[None], scale * sds[None])
        if inflow.any():
            cube += _normal_sufficient_stats(rng, inflow,
                                             scale * inflow_mean * (1.0 + inflow_lift[None]),
                                             scale * inflow_sd)
        metrics[name] = cube
        effects[name] = scale * means
    entered = baseline + inflow
    dates = np.arange(np.datetime64(scenario.start_date, "D"),
                      np.datetime64(scenario.start_date, "D") + n_days, dtype="datetime64[D]")
    table = ObservationTable(tuple(scenario.arms), dates, tuple(names), entered, metrics)
    return Simulation(scenario, table, scenario.schedule(), inflow_days, inflow_units, baseline,
                      effects)


def _normal_sufficient_stats(rng: np.random.Generator, n: np.ndarray, mean: np.ndarray,
                             sd: np.ndarray) -> np.ndarray:
    """Exact (n, sum, sum_sq) of ``n`` iid normal units per cell, ``(..., 3)``."""
    n_float = n.astype(float)
    mean = np.broadcast_to(mean, n.shape)
    sd = np.broadcast_to(sd, n.shape)
    total = n_float * mean + np.sqrt(n_float) * sd * rng.standard_normal(n.shape)
    dof = np.maximum(n_float - 1.0, 1.0)
    squares = np.where(n > 1, sd * sd * rng.chisquare(dof), 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        total_sq = np.where(n > 0, squares + total * total / np.where(n > 0, n_float, 1.0), 0.0)
    total = np.where(n > 0, total, 0.0)
    return np.stack([n_float, total, total_sq], axis=-1)


def reference_scenario(size: float = 0.08, *, labeled: bool = False, start: int = 14,
                       length: int = 2, arms: int = 2, metrics: int = 1) -> Scenario:
    """The reference inflow: 50/50, about 10,000 units a day, a 2-day inflow of 8% of one arm's
    daily traffic into the second arm, unlabelled (mixed into organic) unless ``labeled``."""
    names = ("control", "cards", "map_first")[:arms]
    weights = tuple([1.0 / arms] * arms)
    scenario = Scenario(arms=names, allocation=((0, weights),),
                        lifts=tuple([0.0] + [0.05] * (arms - 1)),
                        metrics=("routes_saved", "minutes_on_route", "photos_shared")[:metrics])
    if size <= 0:
        return scenario
    label = "reactivation_email" if labeled else None
    return scenario.with_inflows(Inflow(arm=1, start=start, length=length, size=size,
                                        label=label))
