"""Anytime-valid sample ratio test: the Dirichlet-multinomial Bayes factor.

Lindon, M. & Malek, A. "Anytime-Valid Inference for Multinomial Count Data", NeurIPS 2022.
Under the planned allocation ``p0`` the Bayes factor of a Dirichlet(``c * p0``) mixture
alternative against the point null is a test martingale, so ``1 / max BF`` is a p-value that
stays valid however often it is read (daily peeking included).

Ramps: each allocation period gets its own martingale, started at the previous period's final
value; a product of test martingales over consecutive periods is again a test martingale.
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from scipy.special import gammaln

# Prior concentration: Dirichlet(c * p0). c = 1000 puts the prior spread of an arm's share at
# about 1.6 percentage points around a 50/50 plan, the size of mismatch worth catching early.
DEFAULT_CONCENTRATION = 1000.0


@dataclass(frozen=True, slots=True)
class SequentialSrm:
    """Daily log Bayes factors and the running anytime-valid p-value."""

    log_bayes_factor: np.ndarray
    p_value: np.ndarray

    @property
    def final_p_value(self) -> float:
        return float(self.p_value[-1]) if self.p_value.size else 1.0


def log_bayes_factor(counts: np.ndarray, null: np.ndarray, concentration: float) -> np.ndarray:
    """log BF of cumulative ``counts`` (looks x arms) against ``null`` probabilities (arms,).

    ``log BF = log B(a + x) - log B(a) - sum_i x_i log p0_i`` with ``a = concentration * p0``
    and ``log B(a) = sum log Gamma(a_i) - log Gamma(sum a_i)``.

    Example:
        >>> float(log_bayes_factor(np.array([[0, 0]]), np.array([0.5, 0.5]), 1000.0)[0])
        0.0
    """
    alpha = concentration * np.asarray(null, dtype=float)
    counts = np.asarray(counts, dtype=float)

    def log_beta(a: np.ndarray) -> np.ndarray:
        return gammaln(a).sum(axis=-1) - gammaln(a.sum(axis=-1))

    return log_beta(alpha + counts) - log_beta(alpha) - (counts * np.log(null)).sum(axis=-1)


def sequential_srm(counts: np.ndarray, planned: np.ndarray,
                   concentration: float = DEFAULT_CONCENTRATION) -> SequentialSrm:
    """Anytime-valid SRM over daily ``counts`` (days x arms) with planned weights per day.

    Example:
        >>> counts = np.array([[5000, 5000]] * 5)
        >>> sequential_srm(counts, np.full((5, 2), 0.5)).final_p_value
        1.0
    """
    counts = np.asarray(counts, dtype=float)
    planned = np.asarray(planned, dtype=float)
    n_days = counts.shape[0]
    log_bf = np.zeros(n_days)
    if n_days == 0:
        return SequentialSrm(log_bf, np.ones(0))
    # Period boundaries: days where the planned weights differ from the previous day.
    changes = np.flatnonzero(np.any(planned[1:] != planned[:-1], axis=1)) + 1
    bounds = np.concatenate([[0], changes, [n_days]])
    carried = 0.0
    for begin, stop in itertools.pairwise(bounds):  # one pass per ramp step
        cumulative = np.cumsum(counts[begin:stop], axis=0)
        period = log_bayes_factor(cumulative, planned[begin], concentration)
        log_bf[begin:stop] = carried + period
        carried = log_bf[stop - 1]
    running_max = np.maximum.accumulate(np.maximum(log_bf, 0.0))
    return SequentialSrm(log_bf, np.exp(-running_max))
