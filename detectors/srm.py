"""Sample ratio mismatch: Pearson chi-square goodness of fit against the planned allocation.

The window scan is read again after every upload, so its level is spent over the experiment's
life rather than per look: a window ending on day ``t`` (1-based) is tested at
``alpha * gamma(t) / k_t`` with ``k_t`` the windows ending that day and
``gamma(t) = (t + 6)^-1.5 / zeta(1.5, 7)`` (which sums to 1 over all days; the offset of a
week keeps the first days from taking most of the budget), a Bonferroni split of
``alpha`` over every window that will ever be tested. A window's counts do not change once its
last day is in, so the chance that any window of an A/A experiment is ever flagged stays below
``alpha`` however often, and however long, the experiment is read (alpha spending, Lan & DeMets
1983, "Discrete sequential boundaries for clinical trials", Biometrika 70:659-663, applied to a
family that grows by day).

The planned allocation may change over time (ramps), so expected counts are built day by day as
``units on the day x weights in force on the day`` and summed over whatever period is tested.
With ramps the pooled statistic is slightly conservative (a sum of multinomials with different
probabilities has less variance than one multinomial), which errs on the side of fewer alarms.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import special

SPENDING_EXPONENT = 1.5
SPENDING_OFFSET = 6
_SPENDING_NORMALISER = float(special.zeta(SPENDING_EXPONENT, SPENDING_OFFSET + 1))


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
    """Windows of 1..max_window days with lifetime-adjusted p-values (:func:`spending`).

    ``selected`` holds non-overlapping windows picked greedily by smallest p-value among those
    whose adjusted p-value is below ``watch_alpha``; ``n_tests`` is the number of windows tested.
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
    p_value = special.chdtrc(df, statistic)  # the chi-square survival function
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


def spending(end_day: np.ndarray | int) -> np.ndarray:
    """Share of the scan's lifetime level spent on windows ending on 1-based day ``end_day``.

    ``gamma(t) = (t + 6)^-1.5 / zeta(1.5, 7)`` (Hurwitz zeta); the shares of all days sum to 1.

    Example:
        >>> round(float(spending(1)), 4), round(float(spending(np.arange(1, 10**6)).sum()), 2)
        (0.0689, 1.0)
    """
    t = np.asarray(end_day, dtype=float)
    return (t + SPENDING_OFFSET) ** -SPENDING_EXPONENT / _SPENDING_NORMALISER


def window_level(end_day: int, max_window: int, alpha: float) -> float:
    """Level at which one window ending on 1-based day ``end_day`` is tested: ``alpha`` times
    the day's spending share, split evenly over the ``min(max_window, end_day)`` windows that
    end on it.

    Example:
        >>> f"{window_level(28, 7, 0.002):.3g}"
        '1.84e-06'
    """
    return float(alpha * spending(end_day) / min(max_window, end_day))


def scan_windows(counts: np.ndarray, planned: np.ndarray, *, max_window: int = 7,
                 watch_alpha: float = 0.05) -> WindowScan:
    """Scan every window of 1..``max_window`` consecutive days for a sample ratio mismatch.

    Each window's summed counts are tested against its summed expected counts (Pearson
    chi-square); its adjusted p-value is ``p * k_t / gamma(t)`` (capped at 1) for a window
    ending on day ``t`` (see the module docstring), so comparing it with ``alpha`` controls the
    chance of any false flag over the experiment's whole life, under daily reading.
    Non-overlapping windows are then chosen greedily by smallest raw p-value, a common way to
    localise scan-statistic clusters (Kulldorff 1997, "A spatial scan statistic",
    Communications in Statistics 26:1481-1496).

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
    end_day = starts + lens  # 1-based index of each window's last day
    per_day = np.minimum(max_window, end_day)
    adjusted = np.minimum(p_value * per_day / spending(end_day), 1.0)
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
