"""SRM, Holm, independence and anytime-valid tests checked against reference libraries.

Reference libraries: scipy (scipy.stats.chisquare, chi2_contingency, dirichlet_multinomial,
multinomial, scipy.special) and statsmodels (statsmodels.stats.multitest.multipletests).
Published example: Kohavi, Tang & Xu, "Trustworthy Online Controlled Experiments" (2020).
Method: Lindon & Malek, "Anytime-Valid Inference for Multinomial Count Data", NeurIPS 2022.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats
from scipy.special import betaln, gammaln
from statsmodels.stats.multitest import multipletests

from detectors.multiplicity import holm_adjust
from detectors.sequential import DEFAULT_CONCENTRATION, log_bayes_factor, sequential_srm
from detectors.srm import chisquare_rows, daily_srm, overall_srm, scan_windows
from detectors.stratify import independence_test, source_fits


def _random_plan(rng: np.random.Generator, arms: int) -> np.ndarray:
    # Weights away from 0 so every arm gets units, as a real allocation does.
    weights = rng.dirichlet(np.full(arms, 3.0))
    weights = 0.05 + 0.95 * weights
    return weights / weights.sum()


# --- Pearson chi-square goodness of fit, reference: scipy.stats.chisquare -------------------


@pytest.mark.parametrize("arms", [2, 3, 4, 5])
def test_chisquare_rows_matches_scipy_chisquare(arms: int) -> None:
    rng = np.random.default_rng(100 + arms)
    for _ in range(20):
        plan = _random_plan(rng, arms)
        true_share = _random_plan(rng, arms) if rng.random() < 0.5 else plan
        observed = rng.multinomial(int(rng.integers(50, 200_000)), true_share)
        expected = observed.sum() * plan
        statistic, p_value = chisquare_rows(observed[None, :], expected[None, :])
        reference = stats.chisquare(observed, f_exp=expected)  # reference: scipy
        assert statistic[0] == pytest.approx(reference.statistic, rel=1e-10, abs=1e-12)
        assert p_value[0] == pytest.approx(reference.pvalue, rel=1e-8, abs=1e-300)


@pytest.mark.parametrize("arms", [2, 3, 4, 5])
def test_overall_srm_matches_scipy_under_a_ramp(arms: int) -> None:
    # Expected counts are built per day with the weights in force; the reference is
    # scipy.stats.chisquare on the summed observed and summed expected counts.
    rng = np.random.default_rng(200 + arms)
    for _ in range(10):
        days = int(rng.integers(3, 40))
        first, second = _random_plan(rng, arms), _random_plan(rng, arms)
        switch = int(rng.integers(1, days))
        planned = np.where(np.arange(days)[:, None] < switch, first, second)
        totals = rng.poisson(rng.uniform(100, 5000), size=days)
        counts = np.stack([rng.multinomial(n, p) for n, p in zip(totals, planned, strict=True)])
        result = overall_srm(counts, planned)
        expected = (counts.sum(axis=1, keepdims=True) * planned).sum(axis=0)
        reference = stats.chisquare(counts.sum(axis=0), f_exp=expected)  # reference: scipy
        assert result.df == arms - 1
        assert result.statistic == pytest.approx(reference.statistic, rel=1e-10, abs=1e-12)
        assert result.p_value == pytest.approx(reference.pvalue, rel=1e-8, abs=1e-300)
        np.testing.assert_allclose(result.expected, expected, rtol=1e-12)
        np.testing.assert_array_equal(result.observed, counts.sum(axis=0))


@pytest.mark.parametrize("arms", [2, 3, 4, 5])
def test_daily_srm_matches_scipy_day_by_day(arms: int) -> None:
    rng = np.random.default_rng(300 + arms)
    days = 30
    planned = np.tile(_random_plan(rng, arms), (days, 1))
    totals = rng.poisson(800, size=days)
    totals[[4, 17]] = 0  # days without units: no test
    counts = np.stack([rng.multinomial(n, p) for n, p in zip(totals, planned, strict=True)])
    smallest = int(np.argmin(planned[0]))
    counts[9, smallest] += counts[9].sum() // 4  # one day with an inflow into the smallest arm
    daily = daily_srm(counts, planned)
    for day in range(days):
        if counts[day].sum() == 0:
            assert daily.statistic[day] == 0.0
            assert np.isnan(daily.p_value[day])
            continue
        reference = stats.chisquare(counts[day], f_exp=counts[day].sum() * planned[day])
        assert daily.statistic[day] == pytest.approx(reference.statistic, rel=1e-10, abs=1e-12)
        assert daily.p_value[day] == pytest.approx(reference.pvalue, rel=1e-8, abs=1e-300)
    assert daily.p_value[9] < 1e-6


def test_kohavi_tang_xu_worked_example() -> None:
    # Kohavi, Tang & Xu, "Trustworthy Online Controlled Experiments" (2020), SRM chapter:
    # 821,588 vs 815,482 units at a planned 50/50 split give p ~ 1.8e-6 (from memory;
    # recomputed here with scipy.stats.chisquare and asserted against it).
    counts = np.array([[821_588, 815_482]])
    result = overall_srm(counts, np.array([[0.5, 0.5]]))
    reference = stats.chisquare([821_588, 815_482], f_exp=[818_535, 818_535])
    assert result.statistic == pytest.approx(reference.statistic, rel=1e-12)
    assert result.p_value == pytest.approx(reference.pvalue, rel=1e-9)
    assert 1.5e-6 <= result.p_value <= 2.1e-6


# --- Holm, reference: statsmodels multipletests(method="holm") ------------------------------


def test_holm_matches_statsmodels() -> None:
    rng = np.random.default_rng(400)
    for size in [1, 2, 3, 7, 25, 180]:
        for _ in range(5):
            p = rng.uniform(0, 1, size) ** rng.uniform(1, 6)
            if size > 3:
                p[: size // 3] = np.round(p[: size // 3], 2)  # ties
            reference = multipletests(p, method="holm")[1]  # reference: statsmodels
            np.testing.assert_allclose(holm_adjust(p), reference, rtol=1e-12, atol=1e-15)


def test_holm_ignores_nan_and_keeps_shape() -> None:
    rng = np.random.default_rng(401)
    p = rng.uniform(0, 0.2, size=(4, 6))
    p[[0, 2, 3], [1, 4, 0]] = np.nan
    adjusted = holm_adjust(p)
    assert adjusted.shape == p.shape
    assert np.array_equal(np.isnan(adjusted), np.isnan(p))
    valid = ~np.isnan(p)
    reference = multipletests(p[valid], method="holm")[1]  # reference: statsmodels
    np.testing.assert_allclose(adjusted[valid], reference, rtol=1e-12)


def test_scan_windows_spends_its_level_over_every_window_it_will_ever_test() -> None:
    # Every window of 1..7 days is one test; a window ending on day t (1-based) is tested at
    # alpha * gamma(t) / min(7, t) with gamma(t) = (t + 6)^-1.5 / zeta(1.5, 7). Rebuild the
    # family with scipy.stats.chisquare and scipy.special.zeta and compare what the scan
    # reports (Bonferroni over a family that grows by day; reference: scipy).
    rng = np.random.default_rng(402)
    days, max_window = 20, 7
    planned = np.tile([0.5, 0.3, 0.2], (days, 1))
    counts = np.stack([rng.multinomial(3000, p) for p in planned])
    counts[12] += [0, 260, 0]
    counts[13] += [0, 240, 0]
    family: dict[tuple[int, int], float] = {}
    adjusted: dict[tuple[int, int], float] = {}
    for length in range(1, max_window + 1):
        for start in range(days - length + 1):
            observed = counts[start:start + length].sum(axis=0)
            expected = (counts[start:start + length].sum(axis=1, keepdims=True)
                        * planned[start:start + length]).sum(axis=0)
            p = stats.chisquare(observed, f_exp=expected).pvalue
            end_day = start + length
            gamma = (end_day + 6) ** -1.5 / special.zeta(1.5, 7)
            family[(start, length)] = p
            adjusted[(start, length)] = min(1.0, p * min(max_window, end_day) / gamma)
    scan = scan_windows(counts, planned, max_window=max_window, watch_alpha=0.05)
    assert scan.n_tests == len(family) == sum(days - k + 1 for k in range(1, 8))
    assert scan.min_adjusted_p_value == pytest.approx(min(adjusted.values()), rel=1e-8)
    assert scan.selected, "a 2-day inflow of ~8% of the arm must be found"
    for window in scan.selected:
        key = (window.start, window.length)
        assert window.p_value == pytest.approx(family[key], rel=1e-8, abs=1e-300)
        assert window.adjusted_p_value == pytest.approx(adjusted[key], rel=1e-8, abs=1e-300)
        assert window.adjusted_p_value < 0.05
    # The spending shares of all days add up to at most 1 (the lifetime guarantee).
    assert special.zeta(1.5, 7) == pytest.approx(sum((t + 6) ** -1.5 for t in range(1, 10**6))
                                                + 2 / np.sqrt(10**6 + 6.5), rel=1e-6)
    chosen_days = {d for w in scan.selected for d in range(w.start, w.stop)}
    assert {12, 13} <= chosen_days


# --- Per source and source x arm, reference: scipy.stats.chisquare / chi2_contingency -------


def test_source_fits_match_scipy_and_statsmodels_holm() -> None:
    rng = np.random.default_rng(500)
    days, sources = 14, ["organic", "newsletter", "push", "paid_search"]
    planned = np.tile([0.4, 0.6], (days, 1))
    entered = rng.poisson(500, size=(days, 2, 4))
    entered[:, 1, 1] += 40  # newsletter pushes extra units into the second arm
    fits = source_fits(entered, planned, sources, alpha=0.0005)
    raw = []
    for index, fit in enumerate(fits):
        observed = entered[:, :, index].sum(axis=0)
        expected = (entered[:, :, index].sum(axis=1, keepdims=True) * planned).sum(axis=0)
        reference = stats.chisquare(observed, f_exp=expected)  # reference: scipy
        assert fit.source == sources[index]
        assert fit.statistic == pytest.approx(reference.statistic, rel=1e-10)
        assert fit.p_value == pytest.approx(reference.pvalue, rel=1e-8, abs=1e-300)
        raw.append(reference.pvalue)
    holm = multipletests(raw, method="holm")[1]  # reference: statsmodels
    for fit, adjusted in zip(fits, holm, strict=True):
        assert fit.adjusted_p_value == pytest.approx(adjusted, rel=1e-8, abs=1e-300)
        assert fit.skewed == (adjusted < 0.0005)
    assert fits[1].skewed


@pytest.mark.parametrize("arms,sources", [(2, 2), (2, 4), (3, 3), (5, 2), (4, 5)])
def test_independence_matches_chi2_contingency(arms: int, sources: int) -> None:
    rng = np.random.default_rng(600 + 10 * arms + sources)
    for _ in range(10):
        entered = rng.poisson(rng.uniform(5, 400, size=(1, arms, sources)),
                              size=(7, arms, sources))
        result = independence_test(entered)
        table = entered.sum(axis=0).T
        reference = stats.chi2_contingency(table, correction=False)  # reference: scipy
        assert result.statistic == pytest.approx(reference.statistic, rel=1e-10, abs=1e-12)
        assert result.p_value == pytest.approx(reference.pvalue, rel=1e-8, abs=1e-300)
        assert result.dof == reference.dof == (arms - 1) * (sources - 1)


def test_independence_drops_empty_sources_and_needs_two() -> None:
    rng = np.random.default_rng(601)
    entered = rng.poisson(300, size=(5, 2, 3))
    entered[:, :, 1] = 0  # a source with no units carries no information
    result = independence_test(entered)
    reference = stats.chi2_contingency(entered.sum(axis=0).T[[0, 2]], correction=False)
    assert result.statistic == pytest.approx(reference.statistic, rel=1e-10)
    assert result.dof == reference.dof == 1
    single = independence_test(entered[:, :, :1])
    assert np.isnan(single.statistic) and np.isnan(single.p_value) and single.dof == 0


# --- Anytime-valid SRM (Lindon & Malek, NeurIPS 2022) ---------------------------------------


def test_log_bayes_factor_two_arms_is_a_beta_function_ratio() -> None:
    # Dirichlet(c p0) mixture over the binomial: BF = B(a1 + x1, a2 + x2) / B(a1, a2) / p^x.
    rng = np.random.default_rng(700)
    for _ in range(50):
        p0 = rng.uniform(0.05, 0.95)
        null = np.array([p0, 1 - p0])
        concentration = rng.choice([10.0, 1000.0, DEFAULT_CONCENTRATION, 1e5])
        x = rng.integers(0, 50_000, size=2)
        a = concentration * null
        reference = (betaln(a[0] + x[0], a[1] + x[1]) - betaln(a[0], a[1])
                     - x[0] * np.log(null[0]) - x[1] * np.log(null[1]))  # scipy.special
        value = log_bayes_factor(x[None, :], null, concentration)[0]
        assert value == pytest.approx(reference, rel=1e-9, abs=1e-7)


@pytest.mark.parametrize("arms", [2, 3, 4, 5])
def test_log_bayes_factor_matches_scipy_distributions(arms: int) -> None:
    # log BF = log DirichletMultinomial(x; c p0) - log Multinomial(x; p0), exactly: the
    # multinomial coefficients cancel. Reference: scipy.stats.dirichlet_multinomial and
    # scipy.stats.multinomial, and a direct gammaln sum (scipy.special).
    rng = np.random.default_rng(710 + arms)
    for _ in range(25):
        null = _random_plan(rng, arms)
        concentration = float(rng.choice([50.0, DEFAULT_CONCENTRATION, 20_000.0]))
        x = rng.multinomial(int(rng.integers(1, 30_000)), _random_plan(rng, arms))
        alpha = concentration * null
        n = int(x.sum())
        via_distributions = (stats.dirichlet_multinomial.logpmf(x, alpha, n)
                             - stats.multinomial.logpmf(x, n, null))
        via_gammaln = (gammaln(alpha + x).sum() - gammaln(alpha.sum() + n)
                       - gammaln(alpha).sum() + gammaln(alpha.sum()) - (x * np.log(null)).sum())
        value = log_bayes_factor(x[None, :], null, concentration)[0]
        assert value == pytest.approx(via_gammaln, rel=1e-9, abs=1e-7)
        assert value == pytest.approx(via_distributions, rel=1e-7, abs=1e-6)


def test_sequential_p_value_is_one_over_running_max_bayes_factor_across_a_ramp() -> None:
    # Each allocation period is its own martingale started at the previous period's value,
    # so log BF on a day = sum of completed periods' log BFs + the current period's.
    rng = np.random.default_rng(720)
    planned = np.vstack([np.tile([0.9, 0.1], (6, 1)), np.tile([0.5, 0.5], (8, 1))])
    counts = np.stack([rng.multinomial(2000, p) for p in planned])
    counts[10] += [0, 150]
    result = sequential_srm(counts, planned, concentration=1000.0)

    def direct(x: np.ndarray, null: np.ndarray) -> float:
        n = int(x.sum())
        return float(stats.dirichlet_multinomial.logpmf(x, 1000.0 * null, n)
                     - stats.multinomial.logpmf(x, n, null))

    first = [direct(counts[: d + 1].sum(axis=0), planned[0]) for d in range(6)]
    second = [first[-1] + direct(counts[6:d + 1].sum(axis=0), planned[6]) for d in range(6, 14)]
    np.testing.assert_allclose(result.log_bayes_factor, first + second, rtol=1e-7, atol=1e-6)
    expected_p = np.minimum(1.0, np.exp(-np.maximum.accumulate(result.log_bayes_factor)))
    np.testing.assert_allclose(result.p_value, expected_p, rtol=1e-12)
    assert np.all(np.diff(result.p_value) <= 0)
    assert result.final_p_value == result.p_value[-1]


def test_sequential_p_value_never_rises_when_evidence_fades() -> None:
    # An early tilt followed by weeks on plan: the Bayes factor rises, then decays. The
    # anytime-valid p-value is 1 / running max (Ville's inequality), so it must keep the low.
    counts = np.array([[4700, 5300]] * 3 + [[5000, 5000]] * 40)
    result = sequential_srm(counts, np.full(counts.shape, 0.5))
    peak = int(np.argmax(result.log_bayes_factor))
    assert result.log_bayes_factor[peak] > 0
    assert result.log_bayes_factor[-1] < result.log_bayes_factor[peak] - 1.0
    assert np.all(np.diff(result.p_value) <= 0)
    assert result.final_p_value == pytest.approx(np.exp(-result.log_bayes_factor[peak]))


def _simulate_daily(rng: np.random.Generator, reps: int, days: int, planned: np.ndarray,
                    true_share: np.ndarray | None = None, mean_units: float = 2000.0
                    ) -> np.ndarray:
    """Daily counts (reps, days, arms): Poisson daily traffic split multinomially."""
    share = planned if true_share is None else true_share
    totals = rng.poisson(mean_units, size=(reps, days))
    return rng.multinomial(totals, np.broadcast_to(share, (reps, days, share.shape[-1])))


NULL_REPS = 400
NULL_LIMIT = 0.05 + 3 * np.sqrt(0.05 * 0.95 / NULL_REPS)  # alpha + 3 standard errors


@pytest.mark.parametrize("weights", [[0.5, 0.5], [0.5, 0.25, 0.25]])
def test_anytime_valid_under_daily_peeking_while_peeked_chisquare_is_not(
        weights: list[float]) -> None:
    # Property of the method (Lindon & Malek 2022, via Ville's inequality): under the null,
    # P(p ever < alpha) <= alpha however often one looks. A plain chi-square read every day
    # at 0.05 rejects far more often (common practice, no source: the peeking problem).
    rng = np.random.default_rng(800 + len(weights))
    days = 28
    planned = np.tile(weights, (days, 1))
    counts = _simulate_daily(rng, NULL_REPS, days, planned)
    sequential = np.array([sequential_srm(c, planned).p_value.min() for c in counts])
    rate = np.mean(sequential < 0.05)
    assert rate <= NULL_LIMIT

    cumulative = np.cumsum(counts, axis=1)
    expected = cumulative.sum(axis=2, keepdims=True) * planned[None]
    peeked = stats.chisquare(cumulative, f_exp=expected, axis=2).pvalue  # reference: scipy
    peeked_rate = np.mean((peeked < 0.05).any(axis=1))
    assert peeked_rate > 0.1
    assert peeked_rate > rate


def test_anytime_valid_under_a_ramp_and_null() -> None:
    rng = np.random.default_rng(810)
    days = 28
    planned = np.vstack([np.tile([0.9, 0.1], (7, 1)), np.tile([0.8, 0.2], (7, 1)),
                         np.tile([0.5, 0.5], (14, 1))])
    counts = _simulate_daily(rng, NULL_REPS, days, planned)
    rate = np.mean([sequential_srm(c, planned).final_p_value < 0.05 for c in counts])
    assert rate <= NULL_LIMIT


def test_anytime_valid_test_has_power_against_a_real_mismatch() -> None:
    # A persistent 51.5/48.5 split against a 50/50 plan (~56,000 units in 4 weeks) must be
    # caught: the null-rate check above is only meaningful if the test can reject.
    rng = np.random.default_rng(820)
    days = 28
    planned = np.tile([0.5, 0.5], (days, 1))
    counts = _simulate_daily(rng, 100, days, planned, true_share=np.array([0.485, 0.515]))
    power = np.mean([sequential_srm(c, planned).final_p_value < 0.05 for c in counts])
    assert power > 0.8
