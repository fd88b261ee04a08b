"""Shared pieces of the changepoint detectors: results, settings, penalty and the cost base class.

Changepoints are found by PELT (Killick, Fearnhead & Eckley 2012, "Optimal detection of
changepoints with a linear computational cost", JASA 107:1590). Costs follow the interface of
``ruptures``' ``BaseCost`` (Truong, Oudre & Vayatis 2020, "Selective review of offline change
point detection methods", Signal Processing 167): ``model``, ``min_size``, ``fit(signal)`` and
``error(start, end)``, so the tests can hand them to ruptures' own PELT as the reference.
"""

from __future__ import annotations

import abc
import datetime as dt
import math
from dataclasses import dataclass

import numpy as np

from ..errors import InputError


class SegmentTooShortError(Exception):
    """A segment shorter than the cost's ``min_size`` has no cost (ruptures' NotEnoughPoints)."""


@dataclass(frozen=True, slots=True)
class ShareChangepoint:
    """A day from which the arms' shares of entering units changed.

    ``date`` is the first day of the new segment. ``before`` and ``after`` give, per arm, the
    ratio of observed to planned units in the segment before and after (1.0 = on plan).

    Example:
        >>> ShareChangepoint(dt.date(2026, 3, 15), {"control": 1.0, "cards": 1.0},
        ...                  {"control": 0.88, "cards": 1.12}).after["cards"]
        1.12
    """

    date: dt.date
    before: dict[str, float]
    after: dict[str, float]


@dataclass(frozen=True, slots=True)
class EngagementChangepoint:
    """A day from which one arm's entrant engagement moved against the other arms.

    ``before`` and ``after`` are the arm's gap to the other arms (the arm's entrant mean of the
    metric minus the pooled entrant mean of the other arms), averaged over the days of the
    segment with inverse-variance weights, so that weekly seasonality shared by all arms cancels.

    Example:
        >>> EngagementChangepoint(dt.date(2026, 3, 15), before=0.02, after=-0.31).after
        -0.31
    """

    date: dt.date
    before: float
    after: float


def information_penalty(params_per_segment: int, n_units: float) -> float:
    """BIC penalty for one extra segment: ``(params + 1) * log(N)``.

    The Bayesian information criterion (Schwarz 1978, "Estimating the dimension of a model",
    Annals of Statistics 6:461) charges ``log N`` per free parameter; a new segment brings its
    own ``params`` plus the changepoint location. ``N`` is the number of units behind the series
    (each unit is one observation), not the number of days: daily counts of thousands of units
    carry far more information than their number of days suggests.

    Why not a constant: under the null of no change, the cost gain of the best split of a series
    behaves like the maximum of about D correlated chi-square variables. A small constant such
    as 3 is exceeded on most A/A experiments; ``2 log N`` with tens of thousands of units is
    about 20, which keeps A/A false alarms well below 1% over 28 daily looks (simulated in
    tests/unit/test_changepoints.py).

    Example:
        >>> round(information_penalty(1, 20_000), 2)
        19.81
    """
    if params_per_segment < 1:
        raise InputError("a segment has at least one parameter", field="params_per_segment")
    return (params_per_segment + 1) * math.log(max(float(n_units), 2.0))


@dataclass(frozen=True, slots=True)
class ChangepointConfig:
    """Settings of the changepoint detectors.

    ``penalty_scale`` multiplies the BIC penalty of :func:`information_penalty` (above 1 for
    fewer, surer changepoints); ``penalty``, when given, replaces it with an explicit value in
    units of twice the log-likelihood. ``min_size`` is the shortest segment in days: 1 lets a
    one-day inflow be isolated by a change on its first day and one on the next. ``jump``
    restricts changepoints to every ``jump``-th day (1 = any day).

    Example:
        >>> ChangepointConfig(penalty_scale=2.0).penalty_for(params_per_segment=1, n_units=1e4)
        36.841361487904734
    """

    penalty_scale: float = 1.0
    penalty: float | None = None
    min_size: int = 1
    jump: int = 1

    def __post_init__(self) -> None:
        if not (math.isfinite(self.penalty_scale) and self.penalty_scale > 0):
            raise InputError("must be a positive number", field="penalty_scale")
        if self.penalty is not None and not (math.isfinite(self.penalty) and self.penalty > 0):
            raise InputError("must be a positive number", field="penalty")
        if not 1 <= self.min_size <= 31:
            raise InputError("must be between 1 and 31 days", field="min_size")
        if not 1 <= self.jump <= 31:
            raise InputError("must be between 1 and 31 days", field="jump")

    def penalty_for(self, params_per_segment: int, n_units: float) -> float:
        """The penalty in force for a series with this many units."""
        if self.penalty is not None:
            return float(self.penalty)
        return self.penalty_scale * information_penalty(params_per_segment, n_units)


class SegmentCost(abc.ABC):
    """A segment cost computed from cumulative sums.

    Subclasses implement :meth:`errors`, the costs of many segments ``[start, end)`` at once
    (``starts`` and ``ends`` broadcast against each other); :meth:`error`, what a ruptures
    estimator calls, is its scalar case, so both always agree. ``fit`` must set ``signal``
    (a ruptures estimator reads its length) and the cumulative sums, making each segment cost
    O(arms) whatever its length. Entries with ``start >= end`` are meaningless and may be NaN.
    """

    model: str
    signal: np.ndarray
    min_size: int

    @abc.abstractmethod
    def fit(self, signal: np.ndarray) -> SegmentCost:
        """Precompute the cumulative sums of ``signal`` (days first); returns ``self``."""

    @abc.abstractmethod
    def errors(self, starts: np.ndarray, ends: np.ndarray | int) -> np.ndarray:
        """Costs of the segments ``[start, end)``, broadcasting ``starts`` against ``ends``."""

    def error(self, start: int, end: int) -> float:
        if end - start < self.min_size:
            raise SegmentTooShortError
        return float(self.errors(np.array([start]), end)[0])
