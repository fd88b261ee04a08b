"""An effect estimate that does not lean on contaminated cells, and trimming bounds around it.

A *contaminated cell* is one (day, entry source) where an incident put units over (or under)
plan into one arm. Post-stratifying on an entry cohort the inflow created is not a
pre-treatment stratification, so no re-weighting of those cells removes the selection. This
module does two things instead:

* **Honest estimate** (``target = "uncontaminated"``): cohorts are entry sources within each
  constant-allocation period; each cohort's arm means use only its uncontaminated days (in every
  arm, so randomisation still holds within them); the cohorts are weighted by the *regular
  population* of the whole experiment: every measured unit less the incidents' excess
  (pooled over arms, so the weight does not depend on the allocation). Post-stratification after
  Miratrix, Sekhon & Yu (JRSS-B 75:369, 2013), Welch-type variances with the weights held fixed.
  The estimate assumes the effect within a source and period is the same on contaminated and
  clean days; cohorts without clean units in some arm are dropped and named.
* **Bounds** on the same target: within each contaminated cell the excess units are trimmed
  (Lee 2009; :func:`detectors.bounds.trimmed_mean_bounds`), assuming only that the incident
  added units to one arm (inflow) or removed them from it (shortfall). For a shortfall Lee's
  reverse logic applies: the missing units' values are not identified at all, so the bound is
  on the units that would have stayed in either arm, and the *other* arms' cells are trimmed by
  the missing share. The per-cohort bounds are combined with the regular-population weights and
  the set gets an Imbens & Manski (2004) interval (:func:`detectors.bounds.identified_set`).

Ramps: pooling across a change of allocation mixes time with arm (Simpson's paradox with
changing weights), so the honest estimate and the bounds are formed within each
constant-allocation period and combined with the periods' weights.

Example (an inflow of 400 units into ``cards`` through ``push`` on the first day):
    >>> import pandas as pd
    >>> rows = pd.DataFrame({"date": ["2026-03-01"] * 4 + ["2026-03-02"] * 4,
    ...     "arm": ["control", "control", "cards", "cards"] * 2,
    ...     "source": ["organic", "push"] * 4,
    ...     "entered": [900, 100, 900, 500, 900, 100, 900, 100],
    ...     "m.n": [900, 100, 900, 500, 900, 100, 900, 100],
    ...     "m.sum": [1800.0, 200, 1980, 440, 1800, 200, 1980, 220],
    ...     "m.sum_sq": [4500.0, 500, 5000, 900, 4500, 500, 5000, 580]})
    >>> table = ObservationTable.from_frame(rows, ["control", "cards"])
    >>> from detectors.contamination import ContaminatedCell
    >>> cells = [ContaminatedCell(dt.date(2026, 3, 1), "push", "cards", 400.0)]
    >>> result = honest_effect(table, "m", cells)
    >>> (cards,) = result.comparisons
    >>> round(cards.naive.difference, 3), round(cards.adjusted.difference, 3)
    (-0.075, 0.2)
    >>> cards.bounds.low < 0.2 < cards.bounds.high
    True
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass, replace
from typing import Any, Protocol

import numpy as np
from scipy import special

from .allocation import AllocationSchedule
from .bounds import Bounds, identified_set, trimmed_mean_bounds
from .data import ObservationTable
from .errors import InputError, Problem
from .reweight import (
    CAVEAT_DESIGN,
    Cohort,
    Comparison,
    Decomposition,
    Reweighting,
    _did_you_mean,
    _estimates,
    _json,
    _unit_variance,
    kitagawa,
)

UNCONTAMINATED = "uncontaminated"
# sum == sum_sq within this relative tolerance on every cell marks a 0/1 metric.
_BINARY_RTOL = 1e-9

CAVEAT_TARGET = (
    "The honest estimate is the effect on the experiment's regular population (every unit less "
    "the incidents' excess), estimated within entry source and allocation period from the days "
    "no incident touched. It assumes the effect within a source and period is the same on the "
    "contaminated days; the bounds need no such assumption.")
CAVEAT_MOMENTS = (
    "The data hold only n, sum and sum_sq per cell, so Lee's sharp trimming bound is not "
    "identified for a continuous metric; the bounds are the tightest the mean and variance "
    "allow (a Cantelli-type bound on a trimmed mean), wider than Lee's bound on unit-level "
    "data.")
CAVEAT_BINARY = ("The metric is 0/1 (sum equals sum_sq in every cell), so the bounds are "
                 "Lee's sharp trimming bounds.")
CAVEAT_EXCESS_KNOWN = (
    "The bounds' interval (Imbens & Manski 2004) treats the incidents' excess units as known; "
    "they are themselves estimated from the counts, so the interval is somewhat too narrow "
    "when an excess is small against the day's traffic.")
CAVEAT_SHORTFALL = (
    "A shortfall removed units whose values are unknown: the bounds then describe the units "
    "that would have stayed in either arm (Lee's trimming of the other arms), not every unit.")
CAVEAT_NO_CELLS = ("No incident marks any cell as contaminated, so the bounds are the "
                   "estimate itself.")
CAVEAT_RAMP = (
    "The allocation changed during the experiment. Pooling across a change mixes time with arm "
    "(the Simpson's-paradox case of changing weights), so the honest estimate and the bounds "
    "are formed within each constant-allocation period and combined with period weights; the "
    "naive difference pools them and can mislead.")


class Cell(Protocol):
    """A contaminated cell: signed units over (+) or under (-) plan in ``arm``."""

    @property
    def date(self) -> dt.date: ...
    @property
    def source(self) -> str: ...
    @property
    def arm(self) -> str: ...
    @property
    def units(self) -> float: ...


@dataclass(frozen=True, slots=True)
class Layout:
    """The arrays every estimate here works on, built once per (table, metric, cells)."""

    cube: np.ndarray          # (days, arms, sources, 3): n, sum, sum_sq of measured units
    excess: np.ndarray        # (days, arms, sources): signed excess in measured units
    period: np.ndarray        # (days,) index of the constant-allocation period
    period_starts: tuple[dt.date, ...]
    binary: bool
    ignored_cells: int        # cells naming a day, source or arm not in the table


@dataclass(frozen=True, slots=True)
class BoundsParts:
    """Per comparison: the set, its interval, and the untrimmed estimate with the same weights."""

    difference: Bounds
    relative: Bounds
    untrimmed: float


def layout(table: ObservationTable, metric: str, cells: Sequence[Cell],
           schedule: AllocationSchedule | None = None) -> Layout:
    """Arrange a metric's cube, the cells' excess and the allocation periods.

    An excess given in entered units is converted to measured units with the cell's measured
    share (``n / entered``); cells outside the table (another day, source or arm) are counted
    in ``ignored_cells`` and otherwise left out.
    """
    if metric not in table.metrics:
        known = sorted(table.metrics)
        raise InputError([Problem("metric", f"unknown metric {metric!r}"
                                  + _did_you_mean(metric, known)
                                  + f"; the data has {', '.join(known) or 'no metrics'}")])
    cube = table.metrics[metric]
    shape = table.entered.shape
    excess = np.zeros(shape)
    ignored = 0
    if cells:
        day_of = {d: i for i, d in enumerate(table.date_list())}
        arm_of = {a: i for i, a in enumerate(table.arms)}
        source_of = {s: i for i, s in enumerate(table.sources)}
        index = [(day_of.get(c.date), arm_of.get(c.arm), source_of.get(c.source), c.units)
                 for c in cells]
        known_cells = [(d, a, s, u) for d, a, s, u in index
                       if d is not None and a is not None and s is not None]
        ignored = len(index) - len(known_cells)
        if known_cells:
            d, a, s, u = (np.array(x) for x in zip(*known_cells, strict=True))
            where = (d.astype(int), a.astype(int), s.astype(int))
            entered = table.entered[where]
            with np.errstate(divide="ignore", invalid="ignore"):
                measured = np.where(entered > 0, cube[..., 0][where] / entered, 1.0)
            np.add.at(excess, where, u.astype(float) * measured)
    if schedule is None or len(schedule.steps) == 1 or table.n_days == 0:
        period = np.zeros(table.n_days, dtype=int)
        starts: tuple[dt.date, ...] = (table.dates[0].item(),) if table.n_days else ()
    else:
        step_days = np.array([np.datetime64(s.start, "D") for s in schedule.steps])
        raw = np.clip(np.searchsorted(step_days, table.dates, side="right") - 1, 0, None)
        used, period = np.unique(raw, return_inverse=True)
        starts = tuple(max(schedule.steps[i].start, table.dates[0].item()) for i in used)
    n, total, total_sq = cube[..., 0], cube[..., 1], cube[..., 2]
    measured_cells = n > 0
    binary = bool(measured_cells.any()) and bool(np.allclose(
        total[measured_cells], total_sq[measured_cells], rtol=_BINARY_RTOL, atol=0.0))
    return Layout(cube, excess, period, starts, binary, ignored)


def _by_period(values: np.ndarray, period: np.ndarray, periods: int) -> np.ndarray:
    """Sum a ``(days, ...)`` array into ``(periods, ...)`` (periods are runs of days)."""
    if periods == 1:
        return values.sum(axis=0, keepdims=True).astype(float)
    starts = np.flatnonzero(np.r_[True, np.diff(period) != 0])
    return np.add.reduceat(values.astype(float), starts, axis=0)


def regular_weights(lay: Layout) -> np.ndarray:
    """Regular-population size per (period, source): measured units less the excess, pooled
    over arms (``(periods, sources)``, clipped at 0)."""
    periods = len(lay.period_starts)
    regular = lay.cube[..., 0].sum(axis=1) - lay.excess.sum(axis=1)      # (days, sources)
    return np.clip(_by_period(regular, lay.period, periods), 0.0, None)


def honest_arrays(lay: Layout) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Clean-day sufficient statistics per (arm, cohort) and the cohort weights.

    Returns ``(n, total, total_sq, weight)``: the first three ``(arms, periods * sources)``,
    ``weight`` ``(periods * sources,)`` normalised over the cohorts with clean units in every
    arm (0 elsewhere). Raises ``ValueError`` when no cohort qualifies.
    """
    periods = len(lay.period_starts)
    contaminated = (lay.excess != 0).any(axis=1)                         # (days, sources)
    clean = lay.cube * (~contaminated)[:, None, :, None]
    stats_ = _by_period(clean, lay.period, periods)                      # (P, arms, S, 3)
    stats_ = stats_.transpose(1, 0, 2, 3).reshape(stats_.shape[1], -1, 3)
    weight = regular_weights(lay).reshape(-1)
    usable = (stats_[..., 0] > 0).all(axis=0) & (weight > 0)
    if not usable.any():
        raise ValueError("no cohort has clean units in every arm")
    weight = np.where(usable, weight, 0.0)
    return stats_[..., 0], stats_[..., 1], stats_[..., 2], weight / weight.sum()


def cohort_names(lay: Layout, sources: Sequence[str]) -> tuple[str, ...]:
    """``SOURCE`` with one period, ``from YYYY-MM-DD|SOURCE`` with several."""
    if len(lay.period_starts) == 1:
        return tuple(sources)
    return tuple(f"from {start.isoformat()}|{source}" for start in lay.period_starts
                 for source in sources)


def bounds_parts(lay: Layout, confidence: float = 0.95, *, by_source: bool = True
                 ) -> list[BoundsParts]:
    """Trimming bounds of each non-reference arm against the reference arm (see module doc).

    ``by_source=False`` pools the sources within each period (cells are still trimmed where
    the excess sits): bounds around the naive difference of each period, which is what an
    incident's impact is measured against. Only the contaminated cells are trimmed; every other
    cell enters with its plain sums, so the cost grows with the cells an incident touched, not
    with the whole cube.
    """
    periods = len(lay.period_starts)
    full = _by_period(lay.cube, lay.period, periods)                    # (P, arms, S, 3)
    weight_all = regular_weights(lay)                                    # (P, S)
    pool = (lambda x: x) if by_source else (lambda x: x.sum(axis=-1, keepdims=True))
    arm_stats = full.sum(axis=(0, 2))                                    # (arms, 3)
    fallback = _unit_variance(arm_stats[:, 0], arm_stats[:, 1], arm_stats[:, 2])
    pooled = np.stack([pool(full[..., i]) for i in range(3)], axis=-1)  # (P, arms, S', 3)
    cohort_var = _unit_variance(pooled[..., 0], pooled[..., 1], pooled[..., 2])
    cohort_var = np.where(pooled[..., 0] > 1, cohort_var, fallback[None, :, None])
    touched_day, touched_source = np.nonzero((lay.excess != 0).any(axis=1))
    cell = (lay.period[touched_day], touched_source)
    sub = lay.cube[touched_day, :, touched_source]                       # (K, arms, 3)
    excess = lay.excess[touched_day, :, touched_source]                  # (K, arms)
    n = sub[..., 0]
    inflow, missing = np.clip(excess, 0.0, None), np.clip(-excess, 0.0, None)
    with np.errstate(divide="ignore", invalid="ignore"):
        lost_share = np.where(missing > 0, missing / (n + missing), 0.0)
    out = []
    for a in range(1, n.shape[1]):
        ends = {}
        for own, other in ((0, a), (a, 0)):
            trim = np.minimum(inflow[:, own] + n[:, own] * lost_share[:, other], n[:, own])
            low, high = trimmed_mean_bounds(n[:, own], sub[:, own, 1], sub[:, own, 2], trim,
                                            binary=lay.binary)
            kept = n[:, own] - trim
            sums = []
            for piece in (np.where(kept > 0, kept * low, 0.0),
                          np.where(kept > 0, kept * high, 0.0)):
                total = full[:, own, :, 1].copy()
                np.add.at(total, cell, piece - sub[:, own, 1])
                sums.append(total)
            kept_sum = full[:, own, :, 0].copy()
            np.add.at(kept_sum, cell, kept - n[:, own])
            ends[own] = (pool(sums[0]), pool(sums[1]), pool(kept_sum))
        kept_ok = (ends[0][2] > 1e-9) & (ends[a][2] > 1e-9) & (pool(weight_all) > 0)
        if not kept_ok.any():
            nan_bounds = Bounds(None, None, None, None)
            out.append(BoundsParts(nan_bounds, nan_bounds, float("nan")))
            continue
        pi = np.where(kept_ok, pool(weight_all), 0.0)
        pi = pi / pi.sum()
        mean_lo, mean_hi, var_of, untrimmed = {}, {}, {}, {}
        for arm in (0, a):
            low_sum, high_sum, kept_sum = ends[arm]
            all_n = pooled[:, arm, :, 0]
            with np.errstate(divide="ignore", invalid="ignore"):
                lo = np.where(kept_ok, low_sum / kept_sum, 0.0)
                hi = np.where(kept_ok, high_sum / kept_sum, 0.0)
                plain = np.where(kept_ok & (all_n > 0), pooled[:, arm, :, 1] / all_n, 0.0)
                v = np.where(kept_ok, cohort_var[:, arm] / kept_sum, 0.0)
            mean_lo[arm], mean_hi[arm] = float((pi * lo).sum()), float((pi * hi).sum())
            var_of[arm] = float((pi**2 * v).sum())
            untrimmed[arm] = float((pi * plain).sum())
        se = float(np.sqrt(var_of[0] + var_of[a]))
        difference = identified_set(mean_lo[a] - mean_hi[0], mean_hi[a] - mean_lo[0], se, se,
                                    confidence)
        relative = _relative_bounds(mean_lo, mean_hi, var_of, a, confidence)
        out.append(BoundsParts(difference, relative, untrimmed[a] - untrimmed[0]))
    return out


def _relative_bounds(low: dict[int, float], high: dict[int, float], var: dict[int, float],
                     a: int, confidence: float) -> Bounds:
    """Bounds on ``M_a / M_r - 1`` over the box of arm means, with delta-method SEs."""
    r_lo, r_hi = low[0], high[0]
    if not (r_lo > 0 or r_hi < 0):
        return Bounds(None, None, None, None)        # the reference mean may be 0
    corners = [(x, y) for x in (low[a], high[a]) for y in (r_lo, r_hi)]
    with np.errstate(over="ignore", divide="ignore", invalid="ignore"):
        # (1/m_r^2) Var(m_a) + (m_a^2/m_r^4) Var(m_r), arranged so m_r^4 cannot underflow.
        values = [float(np.float64(x) / y - 1) for x, y in corners]
        ses = [float(np.sqrt(var[a] + (np.float64(x) / y) ** 2 * var[0]) / abs(y))
               for x, y in corners]
    lo_i, hi_i = int(np.argmin(values)), int(np.argmax(values))
    return identified_set(values[lo_i], values[hi_i], ses[lo_i], ses[hi_i], confidence)


def honest_effect(table: ObservationTable, metric: str, cells: Sequence[Cell],
                  schedule: AllocationSchedule | None = None, *,
                  confidence: float = 0.95) -> Reweighting:
    """The honest estimate and bounds of every arm against the reference arm.

    Args:
        table: the experiment's observations.
        metric: one of the table's metrics.
        cells: contaminated cells (e.g. :func:`detectors.contamination.cells_from_document`);
            none means every cell is clean, and the estimate is post-stratified by source
            (within allocation periods) to the pooled mix.
        schedule: the allocation schedule (its periods); ``None`` is one period.
        confidence: level of the intervals.

    Raises:
        InputError: unknown metric, or no cohort with clean units in every arm (then only the
            bounds are meaningful; :func:`bounds_only` gives them).
    """
    lay = layout(table, metric, cells, schedule)
    try:
        n, total, total_sq, pi = honest_arrays(lay)
    except ValueError:
        raise InputError([Problem("metric", f"no entry source has measured units of {metric!r} "
                                  "on uncontaminated days in every arm; only the bounds can be "
                                  "given")]) from None
    arms = table.arms
    z = float(special.ndtri(0.5 + confidence / 2))  # the normal quantile
    with np.errstate(divide="ignore", invalid="ignore"):
        means = np.where(n > 0, total / n, np.nan)
        var_of_mean = np.where(n > 0, _unit_variance(n, total, total_sq) / np.maximum(n, 1), 0.0)
    adjusted = _estimates((pi * np.nan_to_num(means)).sum(axis=1),
                          (pi**2 * var_of_mean).sum(axis=1), z)
    naive = naive_estimates(lay, z)
    # Decomposition of the naive gap over the same cohorts, every unit counted.
    full = _by_period(lay.cube, lay.period, len(lay.period_starts))
    full = full.transpose(1, 0, 2, 3).reshape(full.shape[1], -1, 3)
    with np.errstate(divide="ignore", invalid="ignore"):
        full_means = np.where(full[..., 0] > 0, full[..., 1] / full[..., 0], np.nan)
    present = full[..., 0].sum(axis=0) > 0
    composition, within = kitagawa(full[..., 0][:, present], full_means[:, present])
    parts = bounds_parts(lay, confidence)
    comparisons = tuple(
        Comparison(arms[a], naive[a - 1], adjusted[a - 1],
                   Decomposition(float(composition[a - 1]), float(within[a - 1])),
                   parts[a - 1].difference, parts[a - 1].relative)
        for a in range(1, len(arms)))
    names = cohort_names(lay, table.sources)
    shown = (n.sum(axis=0) > 0) | (pi > 0)
    cohorts = tuple(Cohort(names[c], float(pi[c]),
                           {arm: int(n[i, c]) for i, arm in enumerate(arms)},
                           {arm: _json(means[i, c]) for i, arm in enumerate(arms)})
                    for c in np.flatnonzero(shown))
    by = ("source",) if len(lay.period_starts) == 1 else ("period", "source")
    caveats = _caveats(lay, cells, pi, n, names, confidence)
    return Reweighting(metric, UNCONTAMINATED, by, comparisons, cohorts, tuple(caveats))


def naive_estimates(lay: Layout, z: float) -> list[Any]:
    """Plain difference of arm means over every measured unit, Welch-type SE."""
    arm_stats = lay.cube.sum(axis=0).sum(axis=1)         # (arms, 3); day axis first: contiguous
    n = arm_stats[:, 0]
    if (n <= 0).any():
        raise InputError([Problem("metric", "some arm has no measured units; there is "
                                  "nothing to compare")])
    return _estimates(arm_stats[:, 1] / n, _unit_variance(n, arm_stats[:, 1], arm_stats[:, 2])
                      / n, z)


def _caveats(lay: Layout, cells: Sequence[Cell], pi: np.ndarray, n: np.ndarray,
             names: Sequence[str], confidence: float) -> list[str]:
    caveats = [CAVEAT_TARGET, CAVEAT_DESIGN,
               f"Intervals are normal approximations at {100 * confidence:g}% with Welch-type "
               "variances; they treat the cohort weights as fixed."]
    weight = regular_weights(lay).reshape(-1)
    dropped = (pi == 0) & (weight > 0)
    if dropped.any():
        share = float(weight[dropped].sum() / weight.sum())
        listed = [names[c] for c in np.flatnonzero(dropped)][:5]
        caveats.append(f"Cohorts without clean measured units in some arm are left out of the "
                       f"honest estimate ({', '.join(listed)}"
                       f"{' and more' if dropped.sum() > 5 else ''}: {100 * share:.1f}% of the "
                       "regular population); the bounds still cover them where units remain.")
    if (lay.excess != 0).any():
        caveats.append(CAVEAT_BINARY if lay.binary else CAVEAT_MOMENTS)
        caveats.append(CAVEAT_EXCESS_KNOWN)
    if (lay.excess < 0).any():
        caveats.append(CAVEAT_SHORTFALL)
    if len(lay.period_starts) > 1:
        caveats.append(CAVEAT_RAMP)
    if lay.ignored_cells:
        caveats.append(f"{lay.ignored_cells} contaminated cell(s) name a day, source or arm "
                       "that is not in the data and were ignored.")
    if not cells:
        caveats.append(CAVEAT_NO_CELLS)
    return caveats


def attach_bounds(result: Reweighting, table: ObservationTable, cells: Sequence[Cell],
                  schedule: AllocationSchedule | None = None, *,
                  exclude_sources: Sequence[str] = (), exclude_dates: Sequence[dt.date] = (),
                  confidence: float = 0.95) -> Reweighting:
    """``result`` with the trimming bounds of ``cells`` on every comparison (any target).

    ``exclude_sources`` and ``exclude_dates``: the exclusions ``result`` was computed with
    (already validated by :func:`detectors.reweight.reweight`); the bounds leave them out too.
    """
    if exclude_sources or exclude_dates:
        dropped = set(exclude_sources)
        table = table.select(
            sources=[s for s in table.sources if s not in dropped],
            day_mask=~np.isin(table.dates, np.array(list(exclude_dates), dtype="datetime64[D]")))
    lay = layout(table, result.metric, cells, schedule)
    parts = bounds_parts(lay, confidence)
    comparisons = tuple(
        Comparison(c.arm, c.naive, c.adjusted, c.decomposition, parts[i].difference,
                   parts[i].relative) for i, c in enumerate(result.comparisons))
    caveats = list(result.caveats)
    if (lay.excess != 0).any():
        caveats += [CAVEAT_BINARY if lay.binary else CAVEAT_MOMENTS, CAVEAT_EXCESS_KNOWN]
        if (lay.excess < 0).any():
            caveats.append(CAVEAT_SHORTFALL)
        caveats.append("The bounds describe the regular population (every unit less the "
                       "incidents' excess), by entry source and allocation period, whatever the "
                       "target of the re-weighted estimate.")
    return Reweighting(result.metric, result.target, result.by, comparisons, result.cohorts,
                       tuple(caveats))


def default_effect(table: ObservationTable, metric: str, cells: Sequence[Cell],
                   schedule: AllocationSchedule | None = None, *, incidents: int = 0
                   ) -> dict[str, Any]:
    """The document of the estimate chosen when a caller gives no option, with ``default``:
    the target, cohorts and excluded cells used and the reason (service and command line).

    When no source has clean units in every arm (an imbalance on every day), the estimate falls
    back to every cell, said so in ``reason``; the bounds still trim the contaminated cells.
    """
    cell_keys = {(c.date, c.source) for c in cells}
    if cells:
        what = (f"{incidents} incident(s)" if incidents else "alert-level flagged days")
        reason = (f"The latest diagnosis has {what} touching {len(cell_keys)} (day, source) "
                  "cell(s). Re-weighting cohorts an inflow created cannot remove its selection, "
                  "so the default leaves those cells out in every arm and weights entry sources "
                  "(within allocation periods) by the regular population: every unit less the "
                  "incidents' excess.")
    else:
        reason = ("The latest diagnosis marks no cell as contaminated, so the default "
                  "post-stratifies by entry source (within allocation periods) to the pooled "
                  "mix of every unit.")
    excluded = cells
    try:
        result = honest_effect(table, metric, cells, schedule)
    except InputError:
        if not cells:
            raise
        everything = honest_effect(table, metric, (), schedule)
        everything = replace(everything, caveats=tuple(
            c for c in everything.caveats if c != CAVEAT_NO_CELLS))
        result = attach_bounds(everything, table, cells, schedule)
        excluded = ()
        reason += (" No entry source has clean units in every arm, so the estimate below "
                   "uses every cell, contaminated ones included, and can be biased; the bounds "
                   "are the honest answer.")
    document = result.to_dict()
    document["default"] = {
        "target": result.target, "by": list(result.by),
        "excluded_cells": [{"date": c.date.isoformat(), "source": c.source, "arm": c.arm,
                            "units": round(c.units, 1)} for c in excluded],
        "reason": reason}
    return document
