"""Sequential detection of a change in arm shares, valid under daily reading over any horizon.

For every possible first day ``s`` of a change, the Dirichlet-multinomial Bayes factor of the
counts from day ``s`` on against the plan (Lindon & Malek, "Anytime-Valid Inference for
Multinomial Count Data", NeurIPS 2022) is a test martingale that starts at 1 on day ``s``. A
mixture of them with weights ``w_s`` summing to at most 1,
``W_t = sum_{s <= t} w_s BF_{s..t}``, is again a test martingale, so by Ville's inequality the
chance that an A/A experiment ever reaches ``W_t >= 1 / alpha`` is at most ``alpha``, however
long it runs and however often it is read; ``1 / max W`` is an anytime-valid p-value. This is
the mixture (Shiryaev-Roberts-like) form of an e-detector (Shin, Ramdas & Rinaldo, "E-detectors:
a nonparametric framework for sequential change detection", 2023) with a controlled
probability of ever raising a false alarm rather than an average run length; unlike a window
scan it keeps adding evidence over an episode of any length, such as a slow trickle.

Weights: ``w_s = gamma(s)``, the same spending sequence as the window scan
(:func:`detectors.srm.spending`). Ramps: each allocation period contributes its own Bayes factor
of the counts from ``max(s, period start)`` on, so every factor is taken against the weights in
force (a product of test martingales over consecutive periods is a test martingale).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np
from scipy.special import logsumexp

from .sequential import DEFAULT_CONCENTRATION, log_bayes_factor
from .srm import spending

# Start days handled per block: bounds memory at days x block x arms floats.
_BLOCK = 256


@dataclass(frozen=True, slots=True)
class ChangeDetection:
    """Daily log mixture e-values, the running anytime-valid p-value and the likeliest start.

    ``log_e[t]``: log W on day ``t``; ``p_value[t]``: ``min(1, 1 / max_{u <= t} W_u)``;
    ``start``: day index of the latest start whose evidence on the day W peaked is within one
    nat of the most (``None`` without evidence), ``peak``: that day.
    """

    log_e: np.ndarray
    p_value: np.ndarray
    start: int | None
    peak: int | None

    @property
    def final_p_value(self) -> float:
        return float(self.p_value[-1]) if self.p_value.size else 1.0


def log_start_bayes_factors(counts: np.ndarray, planned: np.ndarray,
                            concentration: float = DEFAULT_CONCENTRATION) -> np.ndarray:
    """``(days, days)`` matrix of log BF_{s..t} (row ``t``, column ``s``; -inf where ``s > t``).

    Example:
        >>> m = log_start_bayes_factors(np.array([[50, 50], [50, 50]]), np.full((2, 2), 0.5))
        >>> bool(np.isneginf(m[0, 1])), bool(m[1, 0] < 0)
        (True, True)
    """
    counts = np.asarray(counts, dtype=float)
    planned = np.asarray(planned, dtype=float)
    n_days = counts.shape[0]
    cumulative = np.vstack([np.zeros((1, counts.shape[1])), np.cumsum(counts, axis=0)])
    changes = np.flatnonzero(np.any(planned[1:] != planned[:-1], axis=1)) + 1
    bounds = np.concatenate([[0], changes, [n_days]]).astype(int)
    result = np.full((n_days, n_days), -np.inf)
    # Only pairs s <= t are evaluated, a block of end days at a time to bound memory.
    for block in range(0, n_days, _BLOCK):
        t, s = np.tril_indices(n_days)
        keep = (t >= block) & (t < block + _BLOCK)
        t, s = t[keep], s[keep]
        total = np.zeros(t.size)
        for begin, stop in itertools.pairwise(bounds):
            first = np.maximum(s, begin)
            last = np.minimum(t, stop - 1)
            inside = first <= last
            if not inside.any():
                continue
            x = cumulative[last[inside] + 1] - cumulative[first[inside]]
            total[inside] += log_bayes_factor(x, planned[begin], concentration)
        result[t, s] = total
    return result


def detect_share_change(counts: np.ndarray, planned: np.ndarray,
                        concentration: float = DEFAULT_CONCENTRATION) -> ChangeDetection:
    """Mixture e-detector over change start days on daily ``counts`` (days x arms).

    Example:
        >>> rng = np.random.default_rng(1)
        >>> p = np.where(np.arange(28)[:, None] < 10, [0.5, 0.5], [0.47, 0.53])
        >>> counts = np.array([rng.multinomial(10_000, row) for row in p])
        >>> d = detect_share_change(counts, np.full((28, 2), 0.5))
        >>> d.final_p_value < 1e-6, d.start
        (True, 10)
    """
    counts = np.asarray(counts, dtype=float)
    n_days = counts.shape[0]
    if n_days == 0:
        return ChangeDetection(np.zeros(0), np.ones(0), None, None)
    log_bf = log_start_bayes_factors(counts, planned, concentration)
    log_w = np.log(spending(np.arange(1, n_days + 1)))[None, :]
    log_e = logsumexp(log_bf + log_w, axis=1)
    running = np.maximum.accumulate(np.maximum(log_e, 0.0))
    p_value = np.exp(-running)
    if log_e.max() <= 0:
        return ChangeDetection(log_e, p_value, None, None)
    peak = int(np.argmax(log_e))
    # The latest start within one nat of the best: on-plan days before a change (or in an
    # earlier allocation period) leave the Bayes factor almost unchanged, so near-ties are
    # resolved towards the change itself.
    evidence = log_bf[peak, :peak + 1]
    start = int(np.flatnonzero(evidence >= evidence.max() - 1.0)[-1])
    return ChangeDetection(log_e, p_value, start, peak)
