"""Sample ratio mismatch: Pearson chi-square goodness of fit against the planned allocation.

The planned allocation may change over time (ramps), so expected counts are built day by day as
``units on the day x weights in force on the day`` and summed over whatever period is tested.
With ramps the pooled statistic is slightly conservative (a sum of multinomials with different
probabilities has less variance than one multinomial), which errs on the side of fewer alarms.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import stats

from .multiplicity import holm_adjust


@dataclass(frozen=True, slots=True)
class SrmTest:
    """One goodness-of-fit test of arm counts against the plan."""

    statistic: float
    p_value: float
    df: int
    observed: np.ndarray
    expected: np.ndarray


@dataclass(frozen=True, slots=True)
class DailySrm:
    """Per-day tests: arrays over the day axis (p = NaN on days without units)."""

    statistic: np.ndarray
    p_value: np.ndarray
    observed: np.ndarray
    expected: np.ndarray


@dataclass(frozen=True, slots=True)
class Window:
    """A run of ``length`` days starting at day index ``start`` and its test."""

    start: int
    length: int
    statistic: float
    p_value: float
    adjusted_p_value: float

    @property
    def stop(self) -> int:
        return self.start + self.length


@dataclass(frozen=True, slots=True)
class WindowScan:
    """Windows of 1..max_window days, Holm-adjusted over all windows tested.

    ``selected`` holds non-overlapping windows picked greedily by smallest p-value among those
    whose adjusted p-value is below ``watch_alpha``; ``n_tests`` is the family size.
    """

    selected: tuple[Window, ...]
    n_tests: int
    min_adjusted_p_value: float


def chisquare_rows(observed: np.ndarray, expected: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Pearson chi-square of each row of ``observed`` against ``expected`` (same shape).

    Vectorised equivalent of calling ``scipy.stats.chisquare(o, e)`` per row, df = arms - 1.
    Rows without units get statistic 0 and p-value NaN.

    Example:
        >>> s, p = chisquare_rows(np.array([[821588, 815482]]),
        ...                       np.array([[818535.0, 818535.0]]))
        >>> float(p[0]) < 2e-6
        True
    """
    observed = np.asarray(observed, dtype=float)
    expected = np.asarray(expected, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = np.where(expected > 0, (observed - expected) ** 2 / expected, 0.0)
    statistic = terms.sum(axis=-1)
    df = observed.shape[-1] - 1
    p_value = stats.chi2.sf(statistic, df)
    p_value = np.where(expected.sum(axis=-1) > 0, p_value, np.nan)
    return statistic, p_value


def expected_counts(counts: np.ndarray, planned: np.ndarray) -> np.ndarray:
    """Expected units per day and arm: each day's total split by the weights in force."""
    return counts.sum(axis=-1, keepdims=True) * planned


def overall_srm(counts: np.ndarray, planned: np.ndarray) -> SrmTest:
    """Whole-period test. ``counts`` and ``planned`` are ``(days, arms)``.

    Pearson (1900) chi-square goodness of fit, as ``scipy.stats.chisquare``.

    Example:
        >>> t = overall_srm(np.array([[500, 500], [510, 490]]), np.full((2, 2), 0.5))
        >>> round(t.p_value, 3)
        0.655
    """
    observed = counts.sum(axis=0).astype(float)
    expected = expected_counts(counts, planned).sum(axis=0)
    statistic, p_value = chisquare_rows(observed[None, :], expected[None, :])
    p = float(p_value[0]) if np.isfinite(p_value[0]) else 1.0
    return SrmTest(float(statistic[0]), p, counts.shape[1] - 1, observed, expected)


def daily_srm(counts: np.ndarray, planned: np.ndarray) -> DailySrm:
    """One chi-square test per day, vectorised over days."""
    expected = expected_counts(counts, planned)
    statistic, p_value = chisquare_rows(counts, expected)
    return DailySrm(statistic, p_value, counts.astype(float), expected)


def scan_windows(counts: np.ndarray, planned: np.ndarray, *, max_window: int = 7,
                 watch_alpha: float = 0.05) -> WindowScan:
    """Scan every window of 1..``max_window`` consecutive days for a sample ratio mismatch.

    Each window's summed counts are tested against its summed expected counts; the p-values of
    all windows form one Holm family (Holm 1979), so looking at a long experiment does not
    multiply false alarms. Non-overlapping windows are then chosen greedily by smallest raw
    p-value, a common way to localise scan-statistic clusters (Kulldorff 1997, "A spatial scan
    statistic", Communications in Statistics 26:1481-1496).

    Example:
        >>> counts = np.array([[5000, 5000]] * 10); counts[4] = [5000, 5600]
        >>> scan = scan_windows(counts, np.full((10, 2), 0.5))
        >>> [(w.start, w.length) for w in scan.selected]
        [(4, 1)]
    """
    n_days = counts.shape[0]
    if n_days == 0:
        return WindowScan((), 0, 1.0)
    expected = expected_counts(counts, planned)
    zero = np.zeros((1, counts.shape[1]))
    cum_obs = np.vstack([zero, np.cumsum(counts, axis=0, dtype=float)])
    cum_exp = np.vstack([zero, np.cumsum(expected, axis=0)])
    lengths = np.arange(1, min(max_window, n_days) + 1)
    starts_list = [np.arange(n_days - length + 1) for length in lengths]
    starts = np.concatenate(starts_list)
    lens = np.concatenate([np.full(s.size, length) for s, length in zip(starts_list, lengths,
                                                                       strict=True)])
    obs = cum_obs[starts + lens] - cum_obs[starts]
    exp = cum_exp[starts + lens] - cum_exp[starts]
    statistic, p_value = chisquare_rows(obs, exp)
    adjusted = holm_adjust(p_value)
    n_tests = int(np.count_nonzero(~np.isnan(p_value)))
    min_adjusted = float(np.nanmin(adjusted)) if n_tests else 1.0
    candidates = np.flatnonzero(np.nan_to_num(adjusted, nan=1.0) < watch_alpha)
    candidates = candidates[np.lexsort((lens[candidates], p_value[candidates]))]
    taken = np.zeros(n_days, dtype=bool)
    selected: list[Window] = []
    for index in candidates:  # few candidates: only windows already past the watch level
        begin, stop = int(starts[index]), int(starts[index] + lens[index])
        if taken[begin:stop].any():
            continue
        taken[begin:stop] = True
        selected.append(Window(begin, int(lens[index]), float(statistic[index]),
                               float(p_value[index]), float(adjusted[index])))
    selected.sort(key=lambda w: w.start)
    return WindowScan(tuple(selected), n_tests, min_adjusted)
