"""Segment costs for PELT: arm shares of daily counts, engagement gaps, and a 1-D mean shift.

Each cost is a :class:`~.base.SegmentCost` (ruptures' ``BaseCost`` interface) whose ``fit``
precomputes cumulative sums, so the cost of any segment takes O(arms) operations.
"""

from __future__ import annotations

import numpy as np
from scipy.special import xlogy

from ..errors import InputError
from .base import SegmentCost


class MultinomialShareCost(SegmentCost):
    """Twice the negative multinomial log-likelihood of daily arm counts, one tilt per segment.

    The signal is ``np.hstack([counts, planned])`` of shape ``(days, 2 * arms)`` (see
    :meth:`signal_of`): units per day and arm, then the planned weights in force that day (ramps
    change them). Within a segment every arm ``a`` has a tilt ``r_a`` applied to the plan, so
    day ``d`` assigns with probabilities ``p_da = w_da r_a / sum_b w_db r_b``. The tilt is
    estimated as ``r_a = O_a / E_a``, observed over expected units in the segment. That is the
    exact maximum-likelihood estimate when the weights are constant in the segment (then
    ``p_a = O_a / N``); across a ramp step it is a close plug-in and the cost a slight upper
    bound of the minimum. The cost omits the multinomial coefficients, which do not depend on
    the segmentation. Days with no units add nothing; two arms give the binomial cost.

    Days are grouped by distinct weight vector (allocation regime), so the log-normaliser
    ``sum_d n_d log(w_d . r)`` becomes ``sum_k N_k log(w_k . r)`` over the few regimes.

    Example:
        >>> counts = np.array([[50, 50], [50, 50], [40, 60], [40, 60]])
        >>> cost = MultinomialShareCost().fit(
        ...     MultinomialShareCost.signal_of(counts, np.full((4, 2), 0.5)))
        >>> bool(cost.error(0, 4) > cost.error(0, 2) + cost.error(2, 4))
        True
    """

    model = "inrush_multinomial_share"

    def __init__(self, min_size: int = 1) -> None:
        self.min_size = min_size
        self.signal = np.empty((0, 0))

    @staticmethod
    def signal_of(counts: np.ndarray, planned: np.ndarray) -> np.ndarray:
        """The signal this cost fits: counts and planned weights side by side."""
        return np.hstack([np.asarray(counts, float), np.asarray(planned, float)])

    def fit(self, signal: np.ndarray) -> MultinomialShareCost:
        signal = np.asarray(signal, float)
        if signal.ndim != 2 or signal.shape[1] % 2 or signal.shape[1] < 4:
            raise InputError("the share signal is (days, 2 * arms) with at least two arms",
                             field="signal")
        arms = signal.shape[1] // 2
        counts, planned = signal[:, :arms], signal[:, arms:]
        weights = planned / planned.sum(axis=1, keepdims=True)
        units = counts.sum(axis=1)
        regimes, regime_of_day = np.unique(weights, axis=0, return_inverse=True)
        per_regime = np.zeros((len(units), len(regimes)))
        per_regime[np.arange(len(units)), regime_of_day.ravel()] = units
        self.signal = signal
        self._regimes = regimes
        # Arm-major (arms, days + 1) so that each arm's segment sums are one contiguous lookup.
        self._cum_observed = np.ascontiguousarray(_cumulative(counts).T)
        self._cum_expected = np.ascontiguousarray(_cumulative(units[:, None] * weights).T)
        self._cum_regime_units = np.ascontiguousarray(_cumulative(per_regime).T)
        self._cum_plan_loglik = _cumulative(xlogy(counts, weights).sum(axis=1))
        return self

    def errors(self, starts: np.ndarray, ends: np.ndarray | int) -> np.ndarray:
        loglik = self._cum_plan_loglik[ends] - self._cum_plan_loglik[starts]
        normalisers = [np.zeros_like(loglik) for _ in self._regimes]
        # Loops over arms and allocation regimes only (a handful each), never over days.
        for arm, (cum_observed, cum_expected) in enumerate(
                zip(self._cum_observed, self._cum_expected, strict=True)):
            observed = cum_observed[ends] - cum_observed[starts]
            seen = observed > 0
            tilt = np.divide(observed, cum_expected[ends] - cum_expected[starts],
                             out=np.ones_like(loglik), where=seen)
            loglik += observed * np.log(tilt)
            tilt[~seen] = 0.0
            for normaliser, weight in zip(normalisers, self._regimes[:, arm], strict=True):
                normaliser += weight * tilt
        for normaliser, cum_units in zip(normalisers, self._cum_regime_units, strict=True):
            units = cum_units[ends] - cum_units[starts]
            loglik -= units * np.log(np.where(units > 0, normaliser, 1.0))
        return -2.0 * loglik

    def plan_errors(self, starts: np.ndarray, ends: np.ndarray | int) -> np.ndarray:
        """Twice the negative log-likelihood of the segments at the planned weights (no tilt),
        on the scale of :meth:`errors`."""
        return -2.0 * (self._cum_plan_loglik[ends] - self._cum_plan_loglik[starts])

    def ratios(self, start: int, end: int) -> np.ndarray:
        """Observed over planned units per arm in ``[start, end)`` (the tilt ``r``)."""
        observed = self._cum_observed[:, end] - self._cum_observed[:, start]
        expected = self._cum_expected[:, end] - self._cum_expected[:, start]
        return np.divide(observed, expected, out=np.ones_like(observed), where=expected > 0)


class GaussianGapCost(SegmentCost):
    """Weighted residual sum of squares of a daily gap with known variances.

    The signal is ``(days, 2)``: the daily gap ``y_d`` and its weight ``w_d = 1 / SE_d^2`` (see
    :func:`engagement_gap`). The cost of a segment is ``sum w_d (y_d - ybar_w)^2`` with
    ``ybar_w`` the weighted mean: twice the negative Gaussian log-likelihood with known
    variance, up to a constant. Days of weight 0 add nothing.

    Example:
        >>> signal = np.column_stack([[0.0, 0.1, -1.0, -0.9], np.full(4, 100.0)])
        >>> cost = GaussianGapCost().fit(signal)
        >>> round(cost.error(0, 2), 6), round(cost.error(0, 4), 6)
        (0.5, 101.0)
    """

    model = "inrush_gaussian_gap"

    def __init__(self, min_size: int = 1) -> None:
        self.min_size = min_size
        self.signal = np.empty((0, 2))

    def fit(self, signal: np.ndarray) -> GaussianGapCost:
        signal = np.asarray(signal, float)
        if signal.ndim != 2 or signal.shape[1] != 2:
            raise InputError("the gap signal is (days, 2): gap and weight", field="signal")
        gap, weight = signal[:, 0], signal[:, 1]
        total = weight.sum()
        # Centring on the overall mean keeps the cumulative sums free of cancellation.
        centre = float(weight @ gap / total) if total > 0 else 0.0
        centred = np.where(weight > 0, gap - centre, 0.0)
        self.signal = signal
        self.centre = centre
        self._cum_w = _cumulative(weight)
        self._cum_wy = _cumulative(weight * centred)
        self._cum_wyy = _cumulative(weight * centred * centred)
        return self

    def errors(self, starts: np.ndarray, ends: np.ndarray | int) -> np.ndarray:
        w = self._cum_w[ends] - self._cum_w[starts]
        wy = self._cum_wy[ends] - self._cum_wy[starts]
        wyy = self._cum_wyy[ends] - self._cum_wyy[starts]
        explained = np.divide(wy * wy, w, out=np.zeros_like(w), where=w > 0)
        return np.maximum(wyy - explained, 0.0)

    def mean(self, start: int, end: int) -> float:
        """The inverse-variance weighted mean gap over ``[start, end)``."""
        w = self._cum_w[end] - self._cum_w[start]
        if w <= 0:
            return self.centre
        return float(self.centre + (self._cum_wy[end] - self._cum_wy[start]) / w)


class GaussianMeanCost(SegmentCost):
    """Mean shift of a 1-D signal with a robust, common variance.

    The noise standard deviation is estimated once from the median absolute deviation of first
    differences, ``sigma = 1.4826 * MAD(diff y) / sqrt(2)`` (differencing removes the level
    shifts; the MAD resists the few differences that straddle a change; Hampel 1974 for the
    MAD). The cost is ``sum (y - ybar)^2 / sigma^2``, twice the negative Gaussian
    log-likelihood with that variance, up to a constant.

    Example:
        >>> y = np.array([10.0, 11.0, 9.0, 10.0, 20.0, 21.0, 19.0, 20.0])
        >>> cost = GaussianMeanCost().fit(y)
        >>> bool(cost.error(0, 8) > cost.error(0, 4) + cost.error(4, 8))
        True
    """

    model = "inrush_gaussian_mean"

    def __init__(self, min_size: int = 1) -> None:
        self.min_size = min_size
        self.signal = np.empty((0, 1))
        self.sigma = 1.0

    def fit(self, signal: np.ndarray) -> GaussianMeanCost:
        values = np.asarray(signal, float).reshape(-1)
        if values.size < 3 or not np.isfinite(values).all():
            raise InputError("need at least 3 finite values", field="signal")
        steps = np.diff(values)
        mad = float(np.median(np.abs(steps - np.median(steps))))
        # A MAD at rounding level (over half the steps equal) falls back to the plain spread.
        tolerance = 1e-9 * max(float(np.abs(steps).max()), 1e-300)
        sigma = 1.4826 * mad / np.sqrt(2.0)
        if sigma <= tolerance:
            sigma = float(np.std(steps)) / np.sqrt(2.0)
        self.sigma = sigma if sigma > tolerance else 1.0
        centred = (values - values.mean()) / self.sigma
        self.signal = values.reshape(-1, 1)
        self._cum_y = _cumulative(centred)
        self._cum_yy = _cumulative(centred * centred)
        return self

    def errors(self, starts: np.ndarray, ends: np.ndarray | int) -> np.ndarray:
        length = np.asarray(ends) - np.asarray(starts)
        total = self._cum_y[ends] - self._cum_y[starts]
        return np.maximum(self._cum_yy[ends] - self._cum_yy[starts] - total * total / length,
                          0.0)


def engagement_gap(stats: np.ndarray, arm: int) -> np.ndarray:
    """Daily gap of one arm's entrant mean to the other arms' pooled mean, and its weight.

    ``stats`` is ``(days, arms, 3)`` of ``n, sum, sum_sq``. Returns ``(days, 2)``: the gap
    ``mean_arm - mean_others`` and ``w = 1 / (s_arm^2 / n_arm + s_others^2 / n_others)`` with
    sample variances from the sufficient statistics (Welch's standard error). Days where either
    side has fewer than two units or zero variance get gap 0 and weight 0.

    Example:
        >>> day = np.array([[[4, 8.0, 20.0], [4, 4.0, 8.0]]])
        >>> engagement_gap(day, 0).round(3).tolist()
        [[1.0, 1.5]]
    """
    stats = np.asarray(stats, float)
    own = stats[:, arm, :]
    others = stats.sum(axis=1) - own
    mean_own, var_own, ok_own = _moments(own)
    mean_other, var_other, ok_other = _moments(others)
    ok = ok_own & ok_other
    n_own = np.where(ok, own[:, 0], 1.0)
    n_other = np.where(ok, others[:, 0], 1.0)
    variance = np.where(ok, var_own / n_own + var_other / n_other, 1.0)
    gap = np.where(ok, mean_own - mean_other, 0.0)
    weight = np.where(ok, 1.0 / variance, 0.0)
    return np.column_stack([gap, weight])


def _moments(stats: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Mean, sample variance and usability (n >= 2, variance > 0) per day."""
    n, total, total_sq = stats[:, 0], stats[:, 1], stats[:, 2]
    safe_n = np.where(n >= 2, n, 2.0)
    mean = np.where(n >= 2, total / safe_n, 0.0)
    variance = np.where(n >= 2, (total_sq - total * mean) / (safe_n - 1.0), 0.0)
    # Relative floor: a variance that is rounding noise of sum_sq counts as zero.
    floor = 1e-12 * np.maximum(np.abs(total_sq) / safe_n, 1e-300)
    return mean, variance, (n >= 2) & (variance > floor)


def _cumulative(values: np.ndarray) -> np.ndarray:
    """Cumulative sums with a leading zero row, so a segment is ``cum[end] - cum[start]``."""
    values = np.asarray(values, float)
    return np.concatenate([np.zeros((1, *values.shape[1:])), np.cumsum(values, axis=0)])
