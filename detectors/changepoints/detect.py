"""Changepoints in arm shares and in entrant engagement of an experiment's daily data.

Both detectors run PELT (Killick, Fearnhead & Eckley 2012; :mod:`.pelt`, checked against
ruptures, Truong, Oudre & Vayatis 2020) with a likelihood cost and a BIC penalty on the number
of units (:func:`~.base.information_penalty`); a changepoint's ``date`` is the first day of the
new segment.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from ..errors import InputError, Problem
from .base import ChangepointConfig, EngagementChangepoint, ShareChangepoint
from .costs import GaussianGapCost, MultinomialShareCost, engagement_gap
from .pelt import breakpoints


def share_changepoints(counts: np.ndarray, planned: np.ndarray, dates: np.ndarray,
                       arms: Sequence[str], config: ChangepointConfig | None = None
                       ) -> tuple[ShareChangepoint, ...]:
    """Days from which the arms' shares of entering units moved away from (or back to) plan.

    ``counts`` is ``(days, arms)`` units per day and arm, ``planned`` the weights in force each
    day (ramps change them; a ramp step alone is not a change). Cost:
    :class:`~.costs.MultinomialShareCost`, a multinomial likelihood with one tilt of the plan
    per segment; penalty: BIC with ``arms - 1`` parameters per segment and N = units.

    Example:
        >>> rng = np.random.default_rng(7)
        >>> p = np.where(np.arange(28)[:, None] < 14, [0.5, 0.5], [0.44, 0.56])
        >>> counts = np.array([rng.multinomial(1000, row) for row in p])
        >>> dates = np.arange("2026-03-01", "2026-03-29", dtype="datetime64[D]")
        >>> [c.date.isoformat() for c in share_changepoints(
        ...     counts, np.full((28, 2), 0.5), dates, ["control", "cards"])]
        ['2026-03-15']
    """
    config = config or ChangepointConfig()
    counts, planned, days = _check_shares(counts, planned, dates, arms)
    units = float(counts.sum())
    if units <= 0:
        return ()
    cost = MultinomialShareCost(min_size=config.min_size)
    penalty = config.penalty_for(len(arms) - 1, units)
    ends = breakpoints(cost, MultinomialShareCost.signal_of(counts, planned), penalty,
                       min_size=config.min_size, jump=config.jump)
    bounds = [0, *ends]
    changes: list[ShareChangepoint] = []
    for start, change, stop in zip(bounds, bounds[1:-1], bounds[2:], strict=False):
        before, after = cost.ratios(start, change), cost.ratios(change, stop)
        changes.append(ShareChangepoint(
            days[change].item(),
            {a: float(v) for a, v in zip(arms, before, strict=True)},
            {a: float(v) for a, v in zip(arms, after, strict=True)}))
    return tuple(changes)


def engagement_changepoints(stats: np.ndarray, dates: np.ndarray, arms: Sequence[str],
                            config: ChangepointConfig | None = None
                            ) -> dict[str, tuple[EngagementChangepoint, ...]]:
    """Per arm, days from which its entrants' metric moved against the other arms' entrants.

    ``stats`` is ``(days, arms, 3)``: ``n, sum, sum_sq`` of the per-unit metric over the units
    that entered that day (summed over sources). For each arm the daily gap to the other arms
    pooled (:func:`~.costs.engagement_gap`, weighted by its inverse Welch variance) is segmented
    with :class:`~.costs.GaussianGapCost`; taking the gap removes day-of-week effects that all
    arms share. Penalty: BIC with one parameter per segment and N = units measured.

    Example:
        >>> rng = np.random.default_rng(3)
        >>> level = np.where(np.arange(28) < 14, 2.0, 1.6)          # cards' entrants from day 14
        >>> def day(mean):
        ...     x = rng.normal(mean, 1.0, 500)
        ...     return [500, x.sum(), (x * x).sum()]
        >>> stats = np.array([[day(2.0), day(m)] for m in level])
        >>> dates = np.arange("2026-03-01", "2026-03-29", dtype="datetime64[D]")
        >>> found = engagement_changepoints(stats, dates, ["control", "cards"])
        >>> [c.date.isoformat() for c in found["cards"]]
        ['2026-03-15']
    """
    config = config or ChangepointConfig()
    stats, days = _check_stats(stats, dates, arms)
    if len(arms) == 2:
        # With two arms the second arm's gap is exactly minus the first's, with equal weights.
        first = _gap_changepoints(stats, 0, days, config)
        return {arms[0]: first, arms[1]: tuple(
            EngagementChangepoint(c.date, -c.before, -c.after) for c in first)}
    return {arm: _gap_changepoints(stats, index, days, config) for index, arm in enumerate(arms)}


def _gap_changepoints(stats: np.ndarray, arm: int, days: np.ndarray,
                      config: ChangepointConfig) -> tuple[EngagementChangepoint, ...]:
    signal = engagement_gap(stats, arm)
    used = signal[:, 1] > 0
    if used.sum() < 2:
        return ()
    cost = GaussianGapCost(min_size=config.min_size)
    ends = breakpoints(cost, signal, config.penalty_for(1, float(stats[used, :, 0].sum())),
                       min_size=config.min_size, jump=config.jump)
    bounds = [0, *ends]
    return tuple(
        EngagementChangepoint(days[change].item(), cost.mean(start, change),
                              cost.mean(change, stop))
        for start, change, stop in zip(bounds, bounds[1:-1], bounds[2:], strict=False))


def _check_days(dates: np.ndarray, length: int) -> np.ndarray:
    try:
        days = np.asarray(dates).astype("datetime64[D]")
    except (TypeError, ValueError) as error:
        raise InputError("must be calendar dates", field="dates") from error
    if days.shape != (length,):
        raise InputError(f"needs one date per day ({length})", field="dates")
    if np.isnat(days).any():
        raise InputError("must not contain missing dates", field="dates")
    return days


def _check_shares(counts: np.ndarray, planned: np.ndarray, dates: np.ndarray,
                  arms: Sequence[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    counts = np.asarray(counts, float)
    planned = np.asarray(planned, float)
    problems: list[Problem] = []
    if len(arms) < 2:
        problems.append(Problem("arms", "an experiment needs at least two arms"))
    if counts.ndim != 2 or counts.shape[1] != len(arms):
        problems.append(Problem("counts", f"must be (days, {len(arms)} arms)"))
    elif planned.shape != counts.shape:
        problems.append(Problem("planned", f"must have the shape of counts {counts.shape}"))
    if problems:
        raise InputError(problems)
    for row in np.flatnonzero(~np.isfinite(counts).all(axis=1) | (counts < 0).any(axis=1)):
        problems.append(Problem("counts", "must be finite and >= 0", int(row)))
    for row in np.flatnonzero(~np.isfinite(planned).all(axis=1) | (planned <= 0).any(axis=1)):
        problems.append(Problem("planned", "weights must be finite and > 0", int(row)))
    if problems:
        raise InputError(problems)
    return counts, planned, _check_days(dates, counts.shape[0])


def _check_stats(stats: np.ndarray, dates: np.ndarray, arms: Sequence[str]
                 ) -> tuple[np.ndarray, np.ndarray]:
    stats = np.asarray(stats, float)
    if len(arms) < 2:
        raise InputError("an experiment needs at least two arms", field="arms")
    if stats.ndim != 3 or stats.shape[1:] != (len(arms), 3):
        raise InputError(f"must be (days, {len(arms)} arms, 3) of n, sum, sum_sq", field="stats")
    bad = ~np.isfinite(stats).all(axis=(1, 2)) | (stats[:, :, 0] < 0).any(axis=1)
    if bad.any():
        raise InputError([Problem("stats", "must be finite with n >= 0", int(row))
                          for row in np.flatnonzero(bad)])
    return stats, _check_days(dates, stats.shape[0])
