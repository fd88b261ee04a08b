"""PELT through ruptures, with each step's candidate costs evaluated in one vectorised call.

ruptures' ``Pelt`` (Truong, Oudre & Vayatis 2020) evaluates the cost of every admissible
segment one Python call at a time. Without changes in the data PELT's pruning (Killick,
Fearnhead & Eckley 2012) removes almost nothing, so a 180-day series costs ~16,000 calls, about
16 ms even for the cheapest cost. :class:`VectorisedPelt` keeps ruptures' estimator, its
parameters and its recursion (same candidate ends, same admissible starts, same pruning rule
and tie-breaking) and only asks a :class:`~.base.SegmentCost` for all admissible starts of an
end at once. Costs without that method fall back to ruptures' own loop.
"""

from __future__ import annotations

import math

import numpy as np
import ruptures as rpt

from .base import SegmentCost


class VectorisedPelt(rpt.Pelt):
    """ruptures' PELT, vectorised over the admissible starts of each candidate end.

    Example:
        >>> from detectors.changepoints.costs import GaussianMeanCost
        >>> y = np.r_[np.zeros(20), np.full(20, 5.0)] + np.random.default_rng(1).normal(size=40)
        >>> VectorisedPelt(custom_cost=GaussianMeanCost(), min_size=1, jump=1).fit(y).predict(20.0)
        [20, 40]
    """

    def _seg(self, pen: float) -> dict[tuple[int, int], float]:
        cost = self.cost
        if not isinstance(cost, SegmentCost):
            return super()._seg(pen)
        n, min_size, jump = self.n_samples, self.min_size, self.jump
        ends = [k for k in range(0, n, jump) if k >= min_size] + [n]
        best = np.full(n + 1, np.inf)  # best[t]: penalised cost of the best partition of [0, t)
        best[0] = 0.0
        previous = np.zeros(n + 1, dtype=np.int64)
        has_partition = np.zeros(n + 1, dtype=bool)
        has_partition[0] = True
        admissible = np.empty(0, dtype=np.int64)
        for end in ends:
            newest = math.floor((end - min_size) / jump) * jump
            if has_partition[newest]:
                admissible = np.append(admissible, newest)
            if admissible.size == 0:
                continue
            totals = best[admissible] + cost.errors(admissible, end) + pen
            winner = int(np.argmin(totals))
            best[end] = totals[winner]
            previous[end] = admissible[winner]
            has_partition[end] = True
            # PELT's pruning: a start that cannot beat the optimum even before paying the
            # penalty of a further change can never become optimal later.
            admissible = admissible[totals <= best[end] + pen]
        partition: dict[tuple[int, int], float] = {}
        end = n
        while end > 0:
            start = int(previous[end])
            partition[(start, end)] = float(cost.errors(np.array([start]), end)[0]) + pen
            end = start
        return partition


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
    return VectorisedPelt(custom_cost=cost, min_size=cost.min_size, jump=jump).fit(
        signal).predict(penalty)
