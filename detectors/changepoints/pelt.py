"""PELT with each step's candidate costs evaluated in one vectorised call.

ruptures' ``Pelt`` (Truong, Oudre & Vayatis 2020) evaluates the cost of every admissible
segment one Python call at a time. Without changes in the data PELT's pruning (Killick,
Fearnhead & Eckley 2012) removes almost nothing, so a 180-day series costs ~16,000 calls, about
16 ms even for the cheapest cost. :class:`VectorisedPelt` follows ruptures' estimator, its
parameters and its recursion (same candidate ends, same admissible starts, same pruning rule
and tie-breaking) but takes the costs of all admissible starts of an end in one numpy step:
from a table of every segment cost computed in one broadcast call for series of up to 400
days, or from one :meth:`~.base.SegmentCost.errors` call per end beyond. It does not import
ruptures, whose package loads scipy.stats, scipy.signal and scipy.spatial (most of the
command line's start-up); tests/unit/test_changepoints.py checks that the breakpoints equal
those of ruptures' ``Pelt`` with the same costs.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from ..errors import InputError
from .base import SegmentCost


class VectorisedPelt:
    """PELT over a :class:`~.base.SegmentCost`, vectorised over the admissible starts of each
    candidate end; ``fit(signal)`` then ``predict(penalty)`` as in ruptures.

    Example:
        >>> from detectors.changepoints.costs import GaussianMeanCost
        >>> y = np.r_[np.zeros(20), np.full(20, 5.0)] + np.random.default_rng(1).normal(size=40)
        >>> VectorisedPelt(GaussianMeanCost(), min_size=1, jump=1).fit(y).predict(20.0)
        [20, 40]
    """

    def __init__(self, cost: SegmentCost, *, min_size: int = 1, jump: int = 1) -> None:
        if min_size < 1 or jump < 1:
            raise InputError("min_size and jump are at least 1", field="min_size")
        self.cost = cost
        self.min_size = max(min_size, cost.min_size)
        self.jump = jump
        self.n_samples = 0

    def fit(self, signal: np.ndarray) -> VectorisedPelt:
        self.cost.fit(signal)
        self.n_samples = int(np.asarray(signal).shape[0])
        return self

    def predict(self, pen: float) -> list[int]:
        """Segment ends of the optimal penalised partition (the last is the signal length)."""
        if self.n_samples < 2 * self.min_size:
            raise InputError("the signal is shorter than two segments", field="signal")
        return sorted(end for _, end in self._seg(pen))

    def _seg(self, pen: float) -> dict[tuple[int, int], float]:
        cost = self.cost
        n, min_size, jump = self.n_samples, self.min_size, self.jump
        segment_costs = _segment_costs(cost, n)
        ends = [k for k in range(0, n, jump) if k >= min_size] + [n]
        # best[t]: penalised cost of the best partition of [0, t) (inf: none exists). Python
        # lists, because scalar reads and writes on them are faster than on numpy arrays.
        best = [math.inf] * (n + 1)
        best[0] = 0.0
        previous = [0] * (n + 1)
        # as_start[t]: best[t] while t is an admissible start, inf once pruned or not yet
        # admitted; a slice of it replaces ruptures' list of admissible starts.
        as_start = np.full(n + 1, np.inf)
        for end in ends:
            newest = (end - min_size) // jump * jump
            as_start[newest] = best[newest]  # ruptures appends this start at every end
            starts = as_start[: newest + 1]
            totals = starts + segment_costs(newest + 1, end)
            winner = int(totals.argmin())  # first minimum, as ruptures' min() over the list
            value = float(totals[winner])
            if value == math.inf:
                continue
            best[end] = value + pen
            previous[end] = winner
            # PELT's pruning: a start that cannot beat the optimum even before paying the
            # penalty of a further change can never become optimal later.
            np.putmask(starts, totals > value + pen, math.inf)
        partition: dict[tuple[int, int], float] = {}
        end = n
        while end > 0:
            start = int(previous[end])
            partition[(start, end)] = cost.error(start, end) + pen
            end = start
        return partition


# Up to this many days every segment cost is computed in one broadcast call (a table of
# (days + 1)^2 entries per arm); longer series are costed one end at a time.
_TABLE_DAYS = 400


def _segment_costs(cost: SegmentCost, n: int) -> Callable[[int, int], np.ndarray]:
    """``f(k, end)``: costs of ``[t, end)`` for ``t = 0 .. k - 1``, from a table if small."""
    if n > _TABLE_DAYS:
        def one_end(count: int, end: int) -> np.ndarray:
            with np.errstate(all="ignore"):  # starts after the last admissible are not read
                return cost.errors(np.arange(count), end)

        return one_end
    positions = np.arange(n + 1)
    with np.errstate(all="ignore"):  # entries with start >= end are never read
        table = cost.errors(positions[None, :], positions[:, None])  # table[end, start]

    def from_table(count: int, end: int) -> np.ndarray:
        return table[end, :count]

    return from_table


def breakpoints(cost: SegmentCost, signal: np.ndarray, penalty: float, *, min_size: int = 1,
                jump: int = 1) -> list[int]:
    """Segment ends found by PELT (the last is the signal length); ``[]`` for too short a signal.

    Example:
        >>> from detectors.changepoints.costs import GaussianMeanCost
        >>> y = np.r_[np.zeros(10), np.full(10, 4.0)] + np.random.default_rng(2).normal(size=20)
        >>> breakpoints(GaussianMeanCost(), y, penalty=10.0)
        [10, 20]
    """
    cost.min_size = max(cost.min_size, min_size)
    length = int(np.asarray(signal).shape[0])
    if length < 2 * cost.min_size:
        return []
    return VectorisedPelt(cost, min_size=cost.min_size, jump=jump).fit(signal).predict(penalty)
