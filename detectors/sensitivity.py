"""Detection sensitivity: the smallest inflow Inrush would flag, from the experiment's own traffic.

Inrush alerts on a run of days when the window scan (:func:`detectors.srm.scan_windows`) finds
a window whose Pearson chi-square p-value is below the window's share of the scan's lifetime
level ``alpha`` (:func:`detectors.srm.window_level`): for an inflow that ends on day ``D`` of
the experiment, ``alpha * gamma(D) / min(max_window, D)``. ``family_size`` reports that level
as an equivalent number of Bonferroni-split windows, ``alpha / level``.

For an inflow of ``x`` extra units a day into arm ``a`` during ``K`` days, on top of a baseline
of ``N`` units a day split by weights ``w``, the ``K``-day window's expected counts are
``O_a = K (N w_a + x)``, ``O_b = K N w_b`` against the test's ``E = K (N + x) w``. The Pearson
statistic is then approximately noncentral chi-square with ``A - 1`` degrees of freedom and
noncentrality ``lambda = sum_b (O_b - E_b)^2 / E_b = K x^2 (1 - w_a) / ((N + x) w_a)``
(Cohen 1988, "Statistical Power Analysis for the Behavioral Sciences", 2nd ed., ch. 7:
``lambda = N w^2`` with effect size ``w``). The power is
``P(ncx2(A - 1, lambda) > chi2.isf(alpha / m, A - 1))`` (the distribution functions of
``scipy.special``: ``chndtr``, ``chdtri``) and the noncentrality reaching the target power comes
from ``scipy.special.chndtrinc``; the smallest ``x`` then solves a quadratic.

Only the window that matches the inflow is counted, so the figure is slightly conservative:
neighbouring windows overlapping the inflow can also fire.

The whole-period figure answers the same question for the test that decides the whole-period
alert: the anytime-valid Dirichlet-multinomial Bayes factor (:mod:`detectors.sequential`) at
``overall_alpha``. It is the smallest relative shift ``delta`` of one arm's share, the others
scaling down in proportion, caught with the target power over the ``T`` units seen so far.
The shift moves the counts along one direction, on which the Pearson statistic is
``X^2 = T W_a delta^2 / (1 - W_a)`` (``W``: the planned shares of the period); the Bayes
factor computed exactly along it (``scipy.special.gammaln``) crosses ``1 / overall_alpha`` at
a critical ``X^2 = k``, and the power is ``P(ncx2(A - 1, lambda) > k)`` with ``lambda`` the
shift's own ``X^2``. Only the Bayes factor at the end of the period is counted (the test also
fires if it crossed earlier) and one martingale stands for the ramp's product of them, so
this figure, too, is slightly conservative.

Example:
    >>> import numpy as np
    >>> counts = np.full((28, 2), 2000); planned = np.full((28, 2), 0.5)
    >>> s = sensitivity(counts, planned, ["control", "cards"], days=3)
    >>> s.family_size, round(s.arms[0].units_per_day)
    (1088, 221)
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, special

from .errors import InputError, Problem
from .sequential import DEFAULT_CONCENTRATION, log_bayes_factor
from .srm import window_level

WEIGHT_TOLERANCE = 1e-6
MAX_WINDOW_LIMIT = 31


@dataclass(frozen=True, slots=True)
class InflowSensitivity:
    """Smallest extra units per day into ``arm``, held for ``days`` days, flagged with the
    target power; ``share_of_arm_traffic`` = that inflow over the arm's planned daily units."""

    arm: str
    days: int
    units_per_day: float
    share_of_arm_traffic: float


@dataclass(frozen=True, slots=True)
class ShareShiftSensitivity:
    """Smallest relative shift of ``arm``'s share over the whole period caught with the target
    power, and the excess units it means (``None`` when no shift that small is possible)."""

    arm: str
    relative_share_shift: float | None
    units: float | None


@dataclass(frozen=True)
class Sensitivity:
    """What the window scan and the overall test can detect on this experiment's traffic.

    ``window_days`` is the window the figure is computed on (``min(days, max_window)``).
    ``whole_period`` holds one entry per arm; :attr:`whole_period_worst` is the arm that needs
    the largest shift (the figure quoted in :meth:`to_dict`).
    """

    days: int
    window_days: int
    power: float
    alpha: float
    overall_alpha: float
    max_window: int
    family_size: int
    level: float
    baseline_units_per_day: float
    baseline_days_used: int
    weights: dict[str, float]
    arms: tuple[InflowSensitivity, ...]
    whole_period: tuple[ShareShiftSensitivity, ...]
    period_days: int
    period_units: int

    @property
    def whole_period_worst(self) -> ShareShiftSensitivity:
        return max(self.whole_period, key=lambda s: math.inf if s.relative_share_shift is None
                   else s.relative_share_shift)

    @property
    def summary(self) -> str:
        inflows = " or ".join(
            f"{s.units_per_day:,.0f} a day into {s.arm} ({100 * s.share_of_arm_traffic:+.0f}% "
            "of its traffic)" for s in self.arms)
        held = _days(self.days)
        worst = self.whole_period_worst
        if worst.relative_share_shift is None:
            period = (f"the {_days(self.period_days)} so far hold too few units for the overall "
                      f"test to reach {100 * self.power:.0f}% power (anytime-valid, p < "
                      f"{self.overall_alpha:g})")
        else:
            period = (f"over the {_days(self.period_days)} so far the overall test "
                      f"(anytime-valid, p < {self.overall_alpha:g}) catches an arm share off by "
                      f"{100 * worst.relative_share_shift:.1f}% relative (about "
                      f"{worst.units:,.0f} units into {worst.arm})")
        return (f"With about {self.baseline_units_per_day:,.0f} units a day, Inrush flags an "
                f"inflow held for {held} with {100 * self.power:.0f}% probability once it "
                f"reaches about {inflows} (window test at a lifetime level of {self.alpha:g}, "
                f"spent as if over {self.family_size:,} windows); {period}.")

    @property
    def caveats(self) -> tuple[str, ...]:
        notes = [
            "An inflow smaller than these figures can still bias the effect estimate while "
            "passing unnoticed; a clean result is not proof that no campaign reached one arm.",
            f"The figures assume the recent {self.baseline_units_per_day:,.0f} units a day and "
            "the current weights hold on the days of the inflow.",
        ]
        if self.days > self.max_window:
            notes.append(
                f"The scan looks at windows of at most {self.max_window} days, so a "
                f"{self.days}-day inflow is computed on its best {self.max_window}-day window; "
                "several windows along it can fire, so the real chance is higher.")
        return tuple(notes)

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe document."""
        worst = self.whole_period_worst
        return {
            "days": self.days,
            "window_days": self.window_days,
            "power": self.power,
            "alpha": self.alpha,
            "overall_alpha": self.overall_alpha,
            "max_window": self.max_window,
            "family_size": self.family_size,
            "level": self.level,
            "baseline_units_per_day": round(self.baseline_units_per_day, 2),
            "weights": {a: round(w, 6) for a, w in self.weights.items()},
            "arms": [{"arm": s.arm, "units_per_day": round(s.units_per_day, 2),
                      "share_of_arm_traffic": round(s.share_of_arm_traffic, 6)}
                     for s in self.arms],
            "whole_period": {
                "days": self.period_days,
                "total_units": self.period_units,
                "arm": worst.arm,
                "relative_share_shift": _round(worst.relative_share_shift, 6),
                "units": _round(worst.units, 2),
                "by_arm": [{"arm": s.arm, "relative_share_shift": _round(s.relative_share_shift, 6),
                            "units": _round(s.units, 2)} for s in self.whole_period],
            },
            "summary": self.summary,
            "caveats": list(self.caveats),
        }


def chisquare_power(noncentrality: float, df: int, level: float) -> float:
    """Power of a chi-square test at ``level`` with ``df`` degrees of freedom when the statistic
    is noncentral chi-square with the given noncentrality (Cohen 1988, ch. 7).

    Example:
        >>> round(chisquare_power(7.849, 1, 0.05), 3)  # (1.96 + 0.8416)^2: 80% at 5%, df 1
        0.8
    """
    critical = special.chdtri(df, level)  # chi2.isf
    if noncentrality <= 0:
        return float(special.chdtrc(df, critical))  # chi2.sf
    return float(1.0 - special.chndtr(critical, df, noncentrality))  # ncx2.sf


def required_noncentrality(df: int, level: float, power: float) -> float:
    """Noncentrality at which the chi-square test at ``level`` reaches ``power`` (brentq).

    Example:
        >>> round(required_noncentrality(1, 0.05, 0.8), 2)
        7.85
    """
    return noncentrality_beyond(float(special.chdtri(df, level)), df, power)


def noncentrality_beyond(critical: float, df: int, power: float) -> float:
    """Smallest noncentrality at which a noncentral chi-square with ``df`` degrees of freedom
    exceeds ``critical`` with probability ``power`` (0 when the central one already does).

    Example:
        >>> round(noncentrality_beyond(3.841459, 1, 0.8), 2)  # chi2.isf(0.05, 1)
        7.85
    """
    if float(special.chdtrc(df, critical)) >= power:
        return 0.0
    # scipy.special.chndtrinc inverts the noncentral chi-square cdf in the noncentrality.
    return float(special.chndtrinc(critical, df, 1.0 - power))


def inflow_noncentrality(inflow: float, baseline: float, weights: Sequence[float] | np.ndarray,
                         arm: int, days: int) -> float:
    """Noncentrality of the ``days``-day window when ``inflow`` extra units a day enter ``arm``.

    ``sum_b (O_b - E_b)^2 / E_b`` with ``O_a = K (N w_a + x)``, ``O_b = K N w_b`` and
    ``E = K (N + x) w``, which simplifies to ``K x^2 (1 - w_a) / ((N + x) w_a)``.

    Example:
        >>> inflow_noncentrality(100.0, 900.0, [0.5, 0.5], 1, 2)
        20.0
    """
    w = float(np.asarray(weights, dtype=float)[arm])
    return days * inflow * inflow * (1.0 - w) / ((baseline + inflow) * w)


def inflow_power(inflow: float, baseline: float, weights: Sequence[float] | np.ndarray, arm: int,
                 days: int, level: float) -> float:
    """Chance that the ``days``-day window test at ``level`` flags the inflow."""
    df = len(weights) - 1
    return chisquare_power(inflow_noncentrality(inflow, baseline, weights, arm, days), df, level)


def smallest_inflow(baseline: float, weights: Sequence[float] | np.ndarray, arm: int, days: int,
                    level: float, power: float) -> float:
    """Smallest extra units a day into ``arm`` over ``days`` days flagged with ``power`` at
    ``level`` (a per-window level, i.e. already divided by the family size).

    Example:
        >>> round(smallest_inflow(4000.0, [0.5, 0.5], 1, 3, 0.0005 / 175, 0.8))
        207
    """
    # The noncentrality reaching ``power`` (scipy.special.chndtrinc inverts the noncentral
    # chi-square cdf in it), then lambda = K x^2 (1 - w) / ((N + x) w) solved for x >= 0.
    df = len(weights) - 1
    target = noncentrality_beyond(float(special.chdtri(df, level)), df, power)
    w = float(np.asarray(weights, dtype=float)[arm])
    a, b = days * (1.0 - w), target * w
    return float((b + math.sqrt(b * b + 4.0 * a * b * baseline)) / (2.0 * a))


def sensitivity(daily_counts: np.ndarray, planned: np.ndarray, arms: Sequence[str], *, days: int,
                alpha: float = 0.0005, max_window: int = 7, power: float = 0.8,
                baseline_days: int = 14, overall_alpha: float = 0.0005,
                concentration: float = DEFAULT_CONCENTRATION) -> Sensitivity:
    """Smallest one-arm inflow over ``days`` consecutive days flagged with ``power`` probability.

    ``daily_counts`` and ``planned`` are ``(days, arms)``: units per day and arm, and the weights
    in force each day. The baseline is the mean daily total over the last ``baseline_days``
    days with units, split by the weights of the last day with units. The family size is the
    number of windows :func:`detectors.srm.scan_windows` tests on these days (windows holding
    units); when ``days`` is longer than the data, that of a ``days``-day experiment.
    ``alpha`` is the window scan's family level; ``overall_alpha`` and ``concentration`` are
    those of the anytime-valid whole-period test.

    Example:
        >>> import numpy as np
        >>> counts = np.tile([3600, 400], (21, 1)); planned = np.tile([0.9, 0.1], (21, 1))
        >>> s = sensitivity(counts, planned, ["control", "cards"], days=2)
        >>> [round(a.units_per_day) for a in s.arms]
        [860, 88]
    """
    counts, weights_by_day, arm_names = _validate(daily_counts, planned, arms, days, alpha,
                                                  max_window, power, baseline_days,
                                                  overall_alpha, concentration)
    totals = counts.sum(axis=1)
    inflows, baseline, used, weights, level = _window_figures(
        counts, weights_by_day, arm_names, days, alpha, max_window, power, baseline_days)
    window = min(days, max_window)

    period_units = int(np.rint(totals.sum()))
    period_shares = [float(v) for v in
                     (totals[:, None] * weights_by_day).sum(axis=0) / totals.sum()]
    shifts = []
    for index, (arm, share) in enumerate(zip(arm_names, period_shares, strict=True)):
        delta = smallest_share_shift(period_units, period_shares, index, overall_alpha, power,
                                     concentration)
        units = None if delta is None else period_units * share * delta
        shifts.append(ShareShiftSensitivity(arm, delta, units))
    return Sensitivity(
        days=days, window_days=window, power=power, alpha=alpha, overall_alpha=overall_alpha,
        max_window=max_window,
        family_size=round(alpha / level), level=level, baseline_units_per_day=baseline,
        baseline_days_used=used,
        weights=dict(zip(arm_names, weights, strict=True)),
        arms=tuple(inflows), whole_period=tuple(shifts), period_days=int(counts.shape[0]),
        period_units=period_units)


def inflow_sensitivity(daily_counts: np.ndarray, planned: np.ndarray, arms: Sequence[str], *,
                       days: int, alpha: float = 0.0005, max_window: int = 7,
                       power: float = 0.8, baseline_days: int = 14
                       ) -> tuple[tuple[InflowSensitivity, ...], float]:
    """The window part of :func:`sensitivity` alone (cheap enough for every diagnosis): the
    smallest ``days``-day inflow into each arm flagged with ``power``, and the baseline units
    a day it assumes. Inputs are trusted (the diagnosis built them).

    Example:
        >>> figures, baseline = inflow_sensitivity(np.full((28, 2), 150), np.full((28, 2), .5),
        ...                                        ["control", "cards"], days=2)
        >>> baseline, [round(f.share_of_arm_traffic, 2) for f in figures]
        (300.0, [0.54, 0.54])
    """
    counts = np.asarray(daily_counts, dtype=float)
    inflows, baseline, _, _, _ = _window_figures(counts, np.asarray(planned, dtype=float),
                                                 tuple(arms), days, alpha, max_window, power,
                                                 baseline_days)
    return inflows, baseline


def _window_figures(counts: np.ndarray, weights_by_day: np.ndarray, arm_names: tuple[str, ...],
                    days: int, alpha: float, max_window: int, power: float, baseline_days: int
                    ) -> tuple[tuple[InflowSensitivity, ...], float, int, list[float], float]:
    totals = counts.sum(axis=1)
    active = np.flatnonzero(totals > 0)
    recent = active[-baseline_days:]
    baseline = float(totals[recent].mean())
    weights = [float(w) for w in weights_by_day[active[-1]]]
    window = min(days, max_window)
    # The inflow is taken to end on the latest day (or on day ``days`` of a younger experiment).
    level = window_level(max(int(counts.shape[0]), days), max_window, alpha)
    inflows = []
    for index, arm in enumerate(arm_names):
        x = smallest_inflow(baseline, weights, index, window, level, power)
        inflows.append(InflowSensitivity(arm, days, x, x / (baseline * weights[index])))
    return tuple(inflows), baseline, int(recent.size), weights, level


def _shifted_counts(total: float, shares: np.ndarray, arm: int, delta: float) -> np.ndarray:
    """Counts of ``total`` units with ``arm``'s share raised by ``delta`` (relative), the other
    arms' shares scaled down in proportion."""
    shifted = shares * (1.0 - delta * shares[arm] / (1.0 - shares[arm]))
    shifted[arm] = shares[arm] * (1.0 + delta)
    return total * shifted


def sequential_critical_statistic(total: float, shares: Sequence[float] | np.ndarray, arm: int,
                                  alpha: float, concentration: float = DEFAULT_CONCENTRATION
                                  ) -> float | None:
    """Pearson ``X^2`` at which the anytime-valid Bayes factor of ``total`` units, shifted
    towards ``arm``, reaches ``1 / alpha`` (``None`` if no shift within the simplex does).

    Example:
        >>> round(sequential_critical_statistic(280_000, [0.5, 0.5], 1, 0.0005), 1)
        20.9
    """
    weights = np.asarray(shares, dtype=float)
    target = math.log(1.0 / alpha)
    limit = (1.0 - weights[arm]) / weights[arm]  # the arm's share cannot pass 1

    def gap(delta: float) -> float:
        counts = _shifted_counts(total, weights, arm, delta)[None, :]
        return float(log_bayes_factor(counts, weights, concentration)[0]) - target

    upper = min(limit, 1e-3)
    while gap(upper) < 0:
        if upper >= limit * 0.999:
            return None
        upper = min(limit * 0.999, upper * 2.0)
    delta = float(optimize.brentq(gap, 0.0, upper, xtol=1e-14, rtol=1e-12))
    return float(total * weights[arm] * delta * delta / (1.0 - weights[arm]))


def smallest_share_shift(total: float, shares: Sequence[float] | np.ndarray, arm: int,
                         alpha: float, power: float,
                         concentration: float = DEFAULT_CONCENTRATION) -> float | None:
    """Smallest relative shift of ``arm``'s share that the anytime-valid whole-period test at
    ``alpha`` catches with ``power`` over ``total`` units (``None`` when none can).

    Example:
        >>> round(smallest_share_shift(280_000, [0.5, 0.5], 1, 0.0005, 0.8), 4)
        0.0102
    """
    weights = np.asarray(shares, dtype=float)
    if total <= 0:
        return None
    critical = sequential_critical_statistic(total, weights, arm, alpha, concentration)
    if critical is None:
        return None
    scale = total * weights[arm] / (1.0 - weights[arm])  # X^2 = scale * delta^2
    delta = math.sqrt(noncentrality_beyond(critical, len(weights) - 1, power) / scale)
    return delta if weights[arm] * (1.0 + delta) < 1.0 else None


def _validate(daily_counts: np.ndarray, planned: np.ndarray, arms: Sequence[str], days: int,
              alpha: float, max_window: int, power: float, baseline_days: int,
              overall_alpha: float, concentration: float
              ) -> tuple[np.ndarray, np.ndarray, tuple[str, ...]]:
    problems: list[Problem] = []
    counts = np.asarray(daily_counts, dtype=float)
    weights = np.asarray(planned, dtype=float)
    arm_names = tuple(str(a) for a in arms)
    if counts.ndim != 2 or counts.shape[1] < 2:
        problems.append(Problem("daily_counts", "must be a (days, arms) array with >= 2 arms"))
    elif not np.isfinite(counts).all() or (counts < 0).any():
        problems.append(Problem("daily_counts", "must hold finite unit counts >= 0"))
    elif counts.sum() <= 0:
        problems.append(Problem("daily_counts", "no units on any day: nothing to measure from"))
    if weights.shape != counts.shape:
        problems.append(Problem("planned", f"must have the shape of daily_counts {counts.shape}, "
                                           f"got {weights.shape}"))
    elif not np.isfinite(weights).all() or (weights <= 0).any() \
            or (np.abs(weights.sum(axis=1) - 1.0) > WEIGHT_TOLERANCE).any():
        problems.append(Problem("planned", "each day's weights must be positive and sum to 1"))
    if counts.ndim == 2 and len(arm_names) != counts.shape[1]:
        problems.append(Problem("arms", f"{len(arm_names)} arm names for {counts.shape[1]} "
                                        "columns"))
    elif len(set(arm_names)) != len(arm_names):
        problems.append(Problem("arms", "arm names must be unique"))
    if not _whole(days) or days < 1:
        problems.append(Problem("days", "must be a whole number of days >= 1"))
    if not _whole(max_window) or not 1 <= max_window <= MAX_WINDOW_LIMIT:
        problems.append(Problem("max_window",
                                f"must be a whole number of days between 1 and {MAX_WINDOW_LIMIT}"))
    if not _whole(baseline_days) or baseline_days < 1:
        problems.append(Problem("baseline_days", "must be a whole number of days >= 1"))
    if not _fraction(alpha):
        problems.append(Problem("alpha", "must be between 0 and 1"))
    if not _fraction(power) or (_fraction(alpha) and power <= alpha):
        problems.append(Problem("power", "must be between alpha and 1"))
    if not _fraction(overall_alpha) or (_fraction(power) and power <= overall_alpha):
        problems.append(Problem("overall_alpha", "must be between 0 and power"))
    if not isinstance(concentration, int | float) or not math.isfinite(concentration) \
            or concentration <= 0:
        problems.append(Problem("concentration", "must be a finite number > 0"))
    if problems:
        raise InputError(problems)
    return counts, weights, arm_names


def _whole(value: object) -> bool:
    return isinstance(value, int | np.integer) and not isinstance(value, bool)


def _fraction(value: object) -> bool:
    return (isinstance(value, float | int | np.floating) and not isinstance(value, bool)
            and 0.0 < float(value) < 1.0)


def _days(count: int) -> str:
    return f"{count} day" if count == 1 else f"{count} days"


def _round(value: float | None, digits: int) -> float | None:
    return None if value is None else round(value, digits)


__all__ = [
    "InflowSensitivity",
    "Sensitivity",
    "ShareShiftSensitivity",
    "chisquare_power",
    "inflow_noncentrality",
    "inflow_power",
    "noncentrality_beyond",
    "required_noncentrality",
    "sensitivity",
    "sequential_critical_statistic",
    "smallest_inflow",
    "smallest_share_shift",
]
