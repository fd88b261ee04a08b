"""The mixture e-detector of share changes and the lifetime-spent window scan.

Checks against direct computations with scipy, and their published property: the chance that an
A/A experiment is ever flagged, read after every day, stays below the level (Ville 1939 for the
test martingale mixture; Bonferroni for the spent scan), measured by simulation.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from detectors.change_detection import detect_share_change, log_start_bayes_factors
from detectors.sequential import DEFAULT_CONCENTRATION
from detectors.srm import scan_windows, spending


def _log_bf_scipy(x: np.ndarray, null: np.ndarray, concentration: float) -> float:
    """Dirichlet-multinomial over multinomial likelihood of one count vector, both from
    scipy.stats (reference: scipy.stats.dirichlet_multinomial, scipy.stats.multinomial)."""
    n = int(x.sum())
    if n == 0:
        return 0.0
    return float(stats.dirichlet_multinomial.logpmf(x, concentration * null, n)
                 - stats.multinomial.logpmf(x, n, null))


def test_start_bayes_factors_match_scipy_including_a_ramp() -> None:
    rng = np.random.default_rng(4)
    planned = np.vstack([np.tile([0.8, 0.2], (5, 1)), np.tile([0.5, 0.5], (7, 1))])
    counts = np.array([rng.multinomial(400, p) for p in planned])
    matrix = log_start_bayes_factors(counts, planned, DEFAULT_CONCENTRATION)
    for t, s in [(0, 0), (4, 2), (8, 2), (11, 5), (11, 0), (7, 6)]:
        expected = 0.0
        for begin, stop in ((0, 5), (5, 12)):  # one Bayes factor per allocation period
            first, last = max(s, begin), min(t, stop - 1)
            if first <= last:
                expected += _log_bf_scipy(counts[first:last + 1].sum(axis=0), planned[begin],
                                          DEFAULT_CONCENTRATION)
        assert matrix[t, s] == pytest.approx(expected, rel=1e-9, abs=1e-9)
    assert np.isneginf(matrix[3, 4])


def test_mixture_is_the_weighted_sum_over_start_days() -> None:
    rng = np.random.default_rng(5)
    counts = rng.multinomial(1000, [0.5, 0.5], size=15)
    planned = np.full((15, 2), 0.5)
    result = detect_share_change(counts, planned)
    matrix = log_start_bayes_factors(counts, planned)
    weights = spending(np.arange(1, 16))
    for t in (0, 7, 14):
        direct = np.log(np.sum(weights[:t + 1] * np.exp(matrix[t, :t + 1])))
        assert result.log_e[t] == pytest.approx(direct, rel=1e-9, abs=1e-12)
    running = np.maximum.accumulate(np.maximum(result.log_e, 0.0))
    np.testing.assert_allclose(result.p_value, np.exp(-running))


def test_aa_experiments_read_daily_rarely_ever_reach_the_level() -> None:
    """Ville's inequality: P(ever W >= 1/alpha) <= alpha. 400 A/A runs of 60 daily looks at
    alpha = 0.05: the Wilson upper bound of the observed rate must stay under 0.05 plus
    sampling slack (the bound is conservative, so the rate is usually far below)."""
    rng = np.random.default_rng(2026)
    planned = np.full((60, 3), [0.5, 0.25, 0.25])
    ever = [detect_share_change(rng.multinomial(rng.poisson(2000), planned[0], size=60),
                                planned).final_p_value < 0.05 for _ in range(400)]
    assert np.mean(ever) <= 0.05 + 2 * np.sqrt(0.05 * 0.95 / 400)


def test_scan_spent_over_days_keeps_its_lifetime_level() -> None:
    """All windows ever tested share alpha (Bonferroni): 400 A/A runs of 40 days, any window
    with adjusted p < 0.05 at any look (the last look holds every window)."""
    rng = np.random.default_rng(7)
    planned = np.full((40, 2), 0.5)
    hits = [scan_windows(rng.multinomial(5000, [0.5, 0.5], size=40), planned,
                         watch_alpha=0.05).selected != () for _ in range(400)]
    assert np.mean(hits) <= 0.05 + 2 * np.sqrt(0.05 * 0.95 / 400)
    # The spending shares are (t + 6)^-1.5 / zeta(1.5, 7) (reference: scipy.special.zeta).
    assert spending(3) == pytest.approx(9 ** -1.5 / special.zeta(1.5, 7))


def test_a_growing_trickle_is_found_early() -> None:
    # From day 10 one arm receives 3% more of its traffic each day (3%, 6%, 9%, ...).
    rng = np.random.default_rng(11)
    counts = rng.multinomial(10_000, [0.5, 0.5], size=28).astype(float)
    extra = 0.03 * 5000 * np.arange(1, 19)
    counts[10:, 1] += rng.poisson(extra)
    result = detect_share_change(counts, np.full((28, 2), 0.5))
    first_alarm = int(np.argmax(result.p_value < 0.002))
    assert 10 <= first_alarm <= 13


def test_a_step_change_is_dated_from_its_start() -> None:
    # The start that carries most of the evidence dates a steady shift; a growing trickle is
    # dated by the episode finder's segmentation instead (its later days weigh most here).
    rng = np.random.default_rng(12)
    shares = np.where(np.arange(30)[:, None] < 12, [0.5, 0.5], [0.48, 0.52])
    counts = np.array([rng.multinomial(8000, p) for p in shares])
    result = detect_share_change(counts, np.full((30, 2), 0.5))
    assert result.final_p_value < 1e-6
    assert result.start is not None and abs(result.start - 12) <= 2


def test_no_data_and_no_change() -> None:
    empty = detect_share_change(np.zeros((0, 2)), np.zeros((0, 2)))
    assert empty.final_p_value == 1.0 and empty.start is None
    exact = detect_share_change(np.full((10, 2), 500), np.full((10, 2), 0.5))
    assert exact.final_p_value == 1.0 and exact.start is None
