"""Bounds on a mean when some of a cell's units are not the population of interest.

Two pieces of partial identification, both on the ``n, sum, sum_sq`` sufficient statistics:

* **Trimmed-mean bounds.** A cell holds ``n`` units of which ``t`` are known to be outsiders
  (an inflow), but not which. The mean of the ``n - t`` others is bounded by trimming ``t``
  units from the top (lower bound) or the bottom (upper bound): Lee, "Training, Wages, and
  Sample Selection: Estimating Sharp Bounds on Treatment Effects", Review of Economic Studies
  76(3):1071-1102 (2009). With unit-level values that bound is sharp. With only the mean ``m``
  and the population standard deviation ``s`` of the cell it is not identified; the tightest
  bound the two moments allow is

      |mean of the remaining (1 - q) share - m| <= s * sqrt(q / (1 - q)),   q = t / n.

  Derivation: split the cell into the kept part (share ``1 - q``, mean ``a``) and the trimmed
  part (share ``q``, mean ``b``). Then ``m = (1 - q) a + q b`` and, because the variance is at
  least its between-part component, ``s^2 >= q (1 - q) (a - b)^2``. Since ``a - m = q (a - b)``,
  ``|a - m| <= q s / sqrt(q (1 - q)) = s sqrt(q / (1 - q))``. A two-point distribution (every
  kept unit at ``a``, every trimmed one at ``b``) attains it, so no smaller bound holds for all
  distributions with these moments. This is the conditional-mean form of Cantelli's one-sided
  Chebyshev inequality (Cantelli 1928; Mallows & Richter, "Inequalities of Chebyshev type
  involving conditional expectations", Annals of Mathematical Statistics 40:1922-1932, 1969 --
  reference from memory). A 0/1 metric (``sum == sum_sq``) is fully described by its count of
  ones, so it gets Lee's sharp bound.

* **Interval for the identified set.** Imbens & Manski, "Confidence Intervals for Partially
  Identified Parameters", Econometrica 72(6):1845-1857 (2004): with estimated ends ``low``,
  ``high`` and standard errors ``se_low``, ``se_high``, the interval
  ``[low - c se_low, high + c se_high]`` with ``c`` solving
  ``Phi(c + (high - low) / max(se_low, se_high)) - Phi(-c) = level`` covers the true
  parameter (not the whole set) with the given probability. ``c`` runs from the one-sided
  quantile (wide set) to the two-sided one (a point).

Example:
    >>> low, high = trimmed_mean_bounds(np.array([100.0]), np.array([200.0]),
    ...                                 np.array([500.0]), np.array([20.0]))
    >>> round(float(low[0]), 4), round(float(high[0]), 4)
    (1.5, 2.5)
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import optimize, special


@dataclass(frozen=True, slots=True)
class Bounds:
    """An identified set ``[low, high]`` and its Imbens-Manski interval ``[ci_low, ci_high]``.

    ``None`` where an end is undefined (a relative lift whose reference mean may be 0).
    """

    low: float | None
    high: float | None
    ci_low: float | None
    ci_high: float | None

    def to_dict(self) -> dict[str, float | None]:
        return {"low": self.low, "high": self.high, "ci_low": self.ci_low,
                "ci_high": self.ci_high}

    @property
    def width(self) -> float | None:
        if self.low is None or self.high is None:
            return None
        return self.high - self.low


def trimmed_mean_bounds(n: np.ndarray, total: np.ndarray, total_sq: np.ndarray,
                        trim: np.ndarray, *, binary: bool = False
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Bounds on the mean of each cell's units once ``trim`` unknown units are removed.

    Args:
        n, total, total_sq: the cells' measured units, sum and sum of squares (same shape).
        trim: units to remove per cell, clipped to ``[0, n]``; fractional counts are allowed
            (an estimated excess).
        binary: the metric is 0/1: sharp bounds from the count of ones (Lee 2009); otherwise
            the mean-variance bound ``m +- s sqrt(q / (1 - q))`` (see the module docstring).

    Returns:
        ``(low, high)``; NaN where no unit remains (or the cell is empty).

    Example (a 0/1 metric: 40 ones in 100 units, 20 outsiders):
        >>> low, high = trimmed_mean_bounds(np.array([100.0]), np.array([40.0]),
        ...                                 np.array([40.0]), np.array([20.0]), binary=True)
        >>> float(low[0]), float(high[0])
        (0.25, 0.5)
    """
    n = np.asarray(n, dtype=float)
    trim = np.clip(np.asarray(trim, dtype=float), 0.0, n)
    kept = n - trim
    with np.errstate(divide="ignore", invalid="ignore"):
        mean = np.where(n > 0, total / n, np.nan)
        if binary:
            ones = np.asarray(total, dtype=float)
            low = np.maximum(ones - trim, 0.0) / kept
            high = np.minimum(ones, kept) / kept
        else:
            variance = np.clip(total_sq / n - mean * mean, 0.0, None)
            half = np.sqrt(variance * trim / kept)
            low, high = mean - half, mean + half
    empty = kept <= 0
    return np.where(empty, np.nan, low), np.where(empty, np.nan, high)


def imbens_manski_c(width: float, se_low: float, se_high: float, level: float = 0.95) -> float:
    """The critical value ``c`` of Imbens & Manski (2004) for an identified set of ``width``.

    Example:
        >>> round(imbens_manski_c(0.0, 1.0, 1.0), 4), round(imbens_manski_c(100.0, 1.0, 1.0), 4)
        (1.96, 1.6449)
    """
    two_sided = float(special.ndtri(0.5 + level / 2))
    scale = max(se_low, se_high)
    if not math.isfinite(width) or not math.isfinite(scale) or scale <= 0 or width <= 0:
        return two_sided
    ratio = width / scale
    one_sided = float(special.ndtri(level))

    def gap(c: float) -> float:
        return float(special.ndtr(c + ratio) - special.ndtr(-c)) - level

    if gap(one_sided) >= 0:   # the set is so wide that the one-sided quantile already covers
        return one_sided
    return float(optimize.brentq(gap, one_sided, two_sided, xtol=1e-10))


def identified_set(low: float, high: float, se_low: float, se_high: float,
                   level: float = 0.95) -> Bounds:
    """The set ``[low, high]`` with its Imbens-Manski interval (see :func:`imbens_manski_c`).

    Example:
        >>> b = identified_set(-0.1, 0.2, 0.05, 0.05)
        >>> round(b.ci_low, 4), round(b.ci_high, 4)
        (-0.1822, 0.2822)
    """
    values = (low, high, se_low, se_high)
    if not all(math.isfinite(v) for v in values):
        return Bounds(_finite(low), _finite(high), None, None)
    c = imbens_manski_c(high - low, se_low, se_high, level)
    return Bounds(float(low), float(high), float(low - c * se_low), float(high + c * se_high))


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None
