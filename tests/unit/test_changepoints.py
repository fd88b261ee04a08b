"""Changepoint detectors: costs against scipy and ruptures, planted changes, A/A false alarms.

Simulated experiments use the invented demo scenario (Larkspur Trails, experiment
``route-cards`` with arms ``control`` and ``cards``).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest
import ruptures as rpt
from ruptures.base import BaseCost
from ruptures.costs import NotEnoughPoints
from scipy import stats as sps
from scipy.special import gammaln

from detectors.changepoints import (
    ChangepointConfig,
    EngagementChangepoint,
    GaussianGapCost,
    GaussianMeanCost,
    MultinomialShareCost,
    SegmentCost,
    ShareChangepoint,
    VectorisedPelt,
    breakpoints,
    engagement_changepoints,
    engagement_gap,
    information_penalty,
    share_changepoints,
)
from detectors.changepoints import pelt as pelt_module
from detectors.changepoints.base import SegmentTooShortError
from detectors.errors import InputError

ARMS = ["control", "cards"]
START = np.datetime64("2026-03-01")


def days(count: int) -> np.ndarray:
    return START + np.arange(count)


def weekly_traffic(rng: np.random.Generator, count: int, level: float = 1000.0) -> np.ndarray:
    """Daily units with a weekly cycle (weekends quieter), as hiking-app traffic might have."""
    return rng.poisson(level * (1.0 + 0.4 * np.sin(2 * np.pi * np.arange(count) / 7)))


def assign(rng: np.random.Generator, traffic: np.ndarray, probabilities: np.ndarray
           ) -> np.ndarray:
    return np.array([rng.multinomial(n, p) for n, p in zip(traffic, probabilities, strict=True)])


def unit_stats(rng: np.random.Generator, counts: np.ndarray, means: np.ndarray) -> np.ndarray:
    """n, sum, sum_sq of a per-unit count metric (Poisson sessions) per day and arm."""
    out = np.zeros((*counts.shape, 3))
    for day, arm in np.ndindex(counts.shape):
        values = rng.poisson(means[day, arm], counts[day, arm]).astype(float)
        out[day, arm] = values.size, values.sum(), (values * values).sum()
    return out


# --- costs against reference libraries ------------------------------------------------------

def _log_coefficient(counts: np.ndarray) -> float:
    """log of the multinomial coefficients n! / prod c!, summed over days."""
    return float((gammaln(counts.sum(axis=1) + 1) - gammaln(counts + 1).sum(axis=1)).sum())


@pytest.mark.parametrize("ramp", [False, True])
def test_share_cost_equals_scipy_multinomial_logpmf(ramp: bool) -> None:
    # Reference: scipy.stats.multinomial.logpmf, up to the constant multinomial coefficient.
    rng = np.random.default_rng(11)
    planned = np.tile([0.2, 0.3, 0.5], (12, 1))
    if ramp:
        planned[:5] = [0.6, 0.2, 0.2]
    counts = assign(rng, rng.integers(50, 400, 12), planned * [1.1, 1.0, 0.95]
                    / (planned * [1.1, 1.0, 0.95]).sum(axis=1, keepdims=True))
    counts[3] = 0  # a day without units adds nothing
    cost = MultinomialShareCost().fit(MultinomialShareCost.signal_of(counts, planned))
    for start, end in [(0, 12), (2, 9), (3, 4), (6, 12)]:
        segment, weights = counts[start:end], planned[start:end]
        expected = (segment.sum(axis=1)[:, None] * weights).sum(axis=0)
        with np.errstate(invalid="ignore"):  # the empty day alone: no units, no tilt
            tilt = segment.sum(axis=0) / expected
        probabilities = weights * tilt / (weights * tilt).sum(axis=1, keepdims=True)
        loglik = sum(sps.multinomial.logpmf(c, c.sum(), p)
                     for c, p in zip(segment, probabilities, strict=True) if c.sum() > 0)
        reference = -2.0 * (loglik - _log_coefficient(segment))
        assert cost.error(start, end) == pytest.approx(reference, rel=1e-10, abs=1e-8)


def test_share_cost_tilt_is_the_mle_under_constant_weights() -> None:
    # Reference: scipy.optimize over the tilt; with constant weights O/E must be the optimum.
    from scipy.optimize import minimize

    rng = np.random.default_rng(12)
    planned = np.tile([0.5, 0.5], (10, 1))
    counts = assign(rng, rng.integers(100, 300, 10), np.tile([0.46, 0.54], (10, 1)))
    cost = MultinomialShareCost().fit(MultinomialShareCost.signal_of(counts, planned))

    def negative_loglik(log_tilt: np.ndarray) -> float:
        p = planned * np.exp(np.r_[0.0, log_tilt])
        p = p / p.sum(axis=1, keepdims=True)
        return -sum(sps.multinomial.logpmf(c, c.sum(), q) for c, q in zip(counts, p, strict=True))

    best = minimize(negative_loglik, x0=[0.0], method="Nelder-Mead",
                    options={"xatol": 1e-10, "fatol": 1e-12})
    assert cost.error(0, 10) == pytest.approx(2 * best.fun + 2 * _log_coefficient(counts),
                                              abs=1e-6)


def test_gap_weight_is_welch_standard_error() -> None:
    # Reference: scipy.stats.ttest_ind(equal_var=False): gap * sqrt(weight) is Welch's t.
    rng = np.random.default_rng(13)
    own, other_a, other_b = rng.poisson(3.0, 80), rng.poisson(3.4, 120), rng.poisson(2.9, 60)
    others = np.r_[other_a, other_b]
    stats = np.array([[[v.size, v.sum(), (v * v).sum()] for v in (other_a, own, other_b)]],
                     dtype=float)
    gap, weight = engagement_gap(stats, 1)[0]
    welch = sps.ttest_ind(own, others, equal_var=False)
    assert gap == pytest.approx(own.mean() - others.mean())
    assert gap * np.sqrt(weight) == pytest.approx(welch.statistic, rel=1e-10)


def test_gap_cost_is_weighted_residual_sum_of_squares() -> None:
    # Reference: numpy.average for the weighted mean; the cost is sum w (y - ybar_w)^2.
    rng = np.random.default_rng(14)
    gap, weight = rng.normal(0.0, 0.2, 30), rng.uniform(10.0, 200.0, 30)
    weight[[4, 17]] = 0.0
    cost = GaussianGapCost().fit(np.column_stack([gap + 1e3, weight]))
    for start, end in [(0, 30), (3, 18), (17, 18), (5, 6)]:
        w, y = weight[start:end], gap[start:end] + 1e3
        direct = float((w * (y - np.average(y, weights=w)) ** 2).sum()) if w.sum() else 0.0
        assert cost.error(start, end) == pytest.approx(direct, rel=1e-7, abs=1e-7)


def test_gap_days_without_two_units_or_variance_get_no_weight() -> None:
    stats = np.array([
        [[1, 2.0, 4.0], [10, 20.0, 60.0]],      # one unit on a side
        [[5, 10.0, 20.0], [10, 20.0, 60.0]],    # zero variance (all values 2)
        [[5, 10.0, 30.0], [10, 20.0, 60.0]],    # usable
    ])
    assert engagement_gap(stats, 0)[:, 1].tolist()[:2] == [0.0, 0.0]
    assert engagement_gap(stats, 0)[2, 1] > 0


class AsRupturesCost(BaseCost):
    """One of our costs behind ruptures' own ``BaseCost``, so ruptures' PELT can run it."""

    model = "inrush_segment_cost"

    def __init__(self, cost: SegmentCost) -> None:
        self.inner = cost
        self.min_size = cost.min_size

    def fit(self, signal: np.ndarray) -> AsRupturesCost:
        self.inner.fit(signal)
        self.signal = self.inner.signal
        return self

    def error(self, start: int, end: int) -> float:
        try:
            return self.inner.error(start, end)
        except SegmentTooShortError:  # ruptures' estimator prunes on its own exception type
            raise NotEnoughPoints from None


def test_costs_follow_the_ruptures_interface() -> None:
    cost = MultinomialShareCost(min_size=2)
    assert cost.model and cost.min_size == 2
    counts = np.array([[10, 12], [11, 9], [30, 10], [28, 12]])
    cost.fit(MultinomialShareCost.signal_of(counts, np.full((4, 2), 0.5)))
    with pytest.raises(SegmentTooShortError):
        cost.error(1, 2)
    assert cost.error(0, 4) == pytest.approx(float(cost.errors(np.array([0]), 4)[0]))


def test_pelt_rejects_a_signal_shorter_than_two_segments() -> None:
    with pytest.raises(InputError):
        VectorisedPelt(GaussianMeanCost(), min_size=3).fit(np.arange(5.0)).predict(1.0)
    assert breakpoints(GaussianMeanCost(), np.arange(5.0), 1.0, min_size=3) == []


@pytest.mark.parametrize(("min_size", "jump"), [(1, 1), (2, 1), (1, 2), (3, 2)])
@pytest.mark.parametrize("table", [True, False])
def test_vectorised_pelt_equals_ruptures_pelt(min_size: int, jump: int, table: bool,
                                              monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: ruptures' own Pelt (Truong, Oudre & Vayatis 2020) with the same cost.
    if not table:
        monkeypatch.setattr(pelt_module, "_TABLE_DAYS", 0)
    rng = np.random.default_rng(100 + min_size + 10 * jump)
    for _ in range(6):
        length = int(rng.integers(2 * min_size, 45))
        tilt = np.where(np.arange(length)[:, None] < rng.integers(1, length), 1.0, [1.0, 1.12])
        counts = assign(rng, rng.integers(0, 600, length), tilt / tilt.sum(axis=1)[:, None])
        share = MultinomialShareCost.signal_of(counts, np.full((length, 2), 0.5))
        gap = np.column_stack([rng.normal(np.where(np.arange(length) < length // 2, 0, .3), .1),
                               rng.uniform(0, 150, length)])
        for cost_type, signal in [(MultinomialShareCost, share), (GaussianGapCost, gap)]:
            penalty = float(rng.uniform(2.0, 25.0))
            stock = rpt.Pelt(custom_cost=AsRupturesCost(cost_type(min_size=min_size)),
                             min_size=min_size, jump=jump).fit(signal).predict(penalty)
            ours = VectorisedPelt(cost_type(min_size=min_size), min_size=min_size,
                                  jump=jump).fit(signal).predict(penalty)
            assert ours == stock


# --- share changepoints ---------------------------------------------------------------------

def test_planted_share_shift_is_found_with_its_ratios() -> None:
    rng = np.random.default_rng(21)
    length = 28
    probabilities = np.where(np.arange(length)[:, None] < 14, [0.5, 0.5], [0.44, 0.56])
    counts = assign(rng, weekly_traffic(rng, length), probabilities)
    planned = np.full((length, 2), 0.5)
    found = share_changepoints(counts, planned, days(length), ARMS)
    assert len(found) == 1
    change = found[0]
    assert isinstance(change, ShareChangepoint) and isinstance(change.date, dt.date)
    assert abs((change.date - dt.date(2026, 3, 15)).days) <= 1
    split = (np.datetime64(change.date) - START).astype(int)
    for segment, ratios in [(slice(0, split), change.before), (slice(split, None), change.after)]:
        observed = counts[segment].sum(axis=0)
        expected = counts[segment].sum() * 0.5
        assert [ratios[a] for a in ARMS] == pytest.approx(observed / expected, rel=1e-12)
    assert [change.before[a] for a in ARMS] == pytest.approx([1.0, 1.0], abs=0.04)
    assert [change.after[a] for a in ARMS] == pytest.approx([0.88, 1.12], abs=0.04)


def test_one_day_inflow_is_isolated() -> None:
    rng = np.random.default_rng(22)
    length = 28
    probabilities = np.tile([0.5, 0.5], (length, 1))
    probabilities[17] = [0.35, 0.65]  # a push campaign on 18 March reaching only cards users
    counts = assign(rng, weekly_traffic(rng, length), probabilities)
    found = share_changepoints(counts, np.full((length, 2), 0.5), days(length), ARMS)
    assert [c.date for c in found] == [dt.date(2026, 3, 18), dt.date(2026, 3, 19)]
    assert found[0].after["cards"] > 1.2 and found[1].after["cards"] == pytest.approx(1, abs=.05)


def test_ramp_without_shift_gives_no_changepoint() -> None:
    rng = np.random.default_rng(23)
    length = 28
    planned = np.where(np.arange(length)[:, None] < 7, [0.9, 0.1], [0.5, 0.5])
    for _ in range(20):
        counts = assign(rng, weekly_traffic(rng, length), planned)
        assert share_changepoints(counts, planned, days(length), ARMS) == ()
    # The same data judged against a constant plan shows the ramp step: the test can fail.
    flat = share_changepoints(counts, np.full((length, 2), 0.5), days(length), ARMS)
    assert [c.date for c in flat] == [dt.date(2026, 3, 8)]


def test_shift_after_a_ramp_is_found_and_ramp_is_not() -> None:
    rng = np.random.default_rng(24)
    length, arms = 35, ["control", "cards", "cards_map"]
    planned = np.where(np.arange(length)[:, None] < 7, [0.8, 0.1, 0.1], [1 / 3, 1 / 3, 1 / 3])
    tilt = np.where(np.arange(length)[:, None] < 20, 1.0, [1.0, 1.0, 1.15])
    probabilities = planned * tilt / (planned * tilt).sum(axis=1, keepdims=True)
    counts = assign(rng, weekly_traffic(rng, length, 1500.0), probabilities)
    found = share_changepoints(counts, planned, days(length), arms)
    assert len(found) == 1 and abs((found[0].date - dt.date(2026, 3, 21)).days) <= 1
    assert found[0].after["cards_map"] / found[0].after["control"] == pytest.approx(1.15, abs=.04)


def test_share_aa_false_alarms_stay_rare_over_28_daily_looks() -> None:
    # A/A simulation: binomial assignment, weekly seasonality in traffic, 28 daily looks.
    rng = np.random.default_rng(20260301)
    experiments, length = 200, 28
    planned = np.full((length, 2), 0.5)
    final_bic = any_look_bic = final_small = 0
    for _ in range(experiments):
        traffic = weekly_traffic(rng, length, 800.0)
        control = rng.binomial(traffic, 0.5)
        counts = np.column_stack([control, traffic - control])
        final_bic += bool(share_changepoints(counts, planned, days(length), ARMS))
        any_look_bic += any(share_changepoints(counts[:k], planned[:k], days(k), ARMS)
                            for k in range(2, length + 1))
        final_small += bool(share_changepoints(counts, planned, days(length), ARMS,
                                               ChangepointConfig(penalty=3.0)))
    assert final_bic <= 4 and any_look_bic <= 4            # at most 2% of 200
    assert final_small >= 50                               # a constant penalty of 3 fails


# --- engagement changepoints ----------------------------------------------------------------

def test_engagement_gap_drop_in_one_arm_is_found() -> None:
    rng = np.random.default_rng(31)
    length, arms = 28, ["control", "cards", "cards_map"]
    counts = assign(rng, weekly_traffic(rng, length, 1500.0), np.full((length, 3), 1 / 3))
    weekday = 2.0 + 0.6 * np.sin(2 * np.pi * np.arange(length) / 7)  # shared by all arms
    means = np.repeat(weekday[:, None], 3, axis=1)
    means[14:, 1] -= 0.3  # less engaged entrants in cards from 15 March
    found = engagement_changepoints(unit_stats(rng, counts, means), days(length), arms)
    assert set(found) == set(arms)
    assert len(found["cards"]) == 1
    change = found["cards"][0]
    assert isinstance(change, EngagementChangepoint)
    assert abs((change.date - dt.date(2026, 3, 15)).days) <= 1
    assert change.before == pytest.approx(0.0, abs=0.05)
    assert change.after == pytest.approx(-0.3, abs=0.05)


def test_two_arm_engagement_gaps_mirror_each_other() -> None:
    rng = np.random.default_rng(32)
    length = 21
    counts = assign(rng, weekly_traffic(rng, length), np.full((length, 2), 0.5))
    means = np.full((length, 2), 1.5)
    means[10:, 0] += 0.25
    stats = unit_stats(rng, counts, means)
    found = engagement_changepoints(stats, days(length), ARMS)
    assert len(found["control"]) == 1
    (control,), (cards,) = found["control"], found["cards"]
    assert control.date == cards.date
    assert (cards.before, cards.after) == pytest.approx((-control.before, -control.after))
    # The mirror equals the gap of cards computed directly (cards listed first).
    direct = engagement_changepoints(stats[:, ::-1], days(length), ["cards", "control"])
    assert [c.date for c in direct["cards"]] == [cards.date]
    assert (direct["cards"][0].before, direct["cards"][0].after) == pytest.approx(
        (cards.before, cards.after))


def test_engagement_aa_false_alarms_stay_rare() -> None:
    rng = np.random.default_rng(20260302)
    length, found_bic, found_small = 28, 0, 0
    for _ in range(100):
        counts = assign(rng, weekly_traffic(rng, length, 400.0), np.full((length, 2), 0.5))
        weekday = 2.0 + 0.8 * np.sin(2 * np.pi * np.arange(length) / 7)
        stats = unit_stats(rng, counts, np.repeat(weekday[:, None], 2, axis=1))
        found_bic += bool(engagement_changepoints(stats, days(length), ARMS)["cards"])
        found_small += bool(engagement_changepoints(
            stats, days(length), ARMS, ChangepointConfig(penalty=3.0))["cards"])
    assert found_bic <= 2 and found_small >= 25


# --- edges, settings and errors -------------------------------------------------------------

def test_short_empty_and_gappy_series() -> None:
    planned = np.full((1, 2), 0.5)
    assert share_changepoints(np.array([[40, 60]]), planned, days(1), ARMS) == ()
    assert share_changepoints(np.zeros((10, 2)), np.full((10, 2), 0.5), days(10), ARMS) == ()
    config = ChangepointConfig(min_size=3)
    assert share_changepoints(np.full((5, 2), 50), np.full((5, 2), .5), days(5), ARMS,
                              config) == ()
    rng = np.random.default_rng(41)
    counts = assign(rng, weekly_traffic(rng, 20), np.full((20, 2), 0.5))
    counts[[0, 7, 8, 19]] = 0  # days without units anywhere, even at the ends
    assert share_changepoints(counts, np.full((20, 2), 0.5), days(20), ARMS) == ()
    empty = engagement_changepoints(np.zeros((6, 2, 3)), days(6), ARMS)
    assert empty == {"control": (), "cards": ()}


def test_changes_are_free_of_nan_with_empty_days_around_them() -> None:
    rng = np.random.default_rng(42)
    probabilities = np.where(np.arange(30)[:, None] < 15, [0.5, 0.5], [0.42, 0.58])
    counts = assign(rng, weekly_traffic(rng, 30), probabilities)
    counts[[3, 14, 15, 16]] = 0
    found = share_changepoints(counts, np.full((30, 2), 0.5), days(30), ARMS)
    assert len(found) == 1 and abs((found[0].date - dt.date(2026, 3, 16)).days) <= 2
    assert all(np.isfinite(v) for c in found for v in [*c.before.values(), *c.after.values()])


def test_penalty_settings() -> None:
    assert information_penalty(2, 1e5) == pytest.approx(3 * np.log(1e5))
    assert ChangepointConfig().penalty_for(1, 1e4) == pytest.approx(2 * np.log(1e4))
    assert ChangepointConfig(penalty_scale=1.5).penalty_for(1, 1e4) == pytest.approx(
        3 * np.log(1e4))
    assert ChangepointConfig(penalty=7.0).penalty_for(3, 1e9) == 7.0
    rng = np.random.default_rng(43)
    probabilities = np.where(np.arange(28)[:, None] < 14, [0.5, 0.5], [0.47, 0.53])
    counts = assign(rng, weekly_traffic(rng, 28), probabilities)
    planned = np.full((28, 2), 0.5)
    assert share_changepoints(counts, planned, days(28), ARMS)
    assert share_changepoints(counts, planned, days(28), ARMS,
                              ChangepointConfig(penalty=1e4)) == ()


@pytest.mark.parametrize("settings", [{"penalty_scale": 0.0}, {"penalty": -1.0},
                                      {"min_size": 0}, {"jump": 0},
                                      {"penalty_scale": float("nan")}])
def test_bad_settings_are_refused(settings: dict[str, float]) -> None:
    with pytest.raises(InputError) as error:
        ChangepointConfig(**settings)  # type: ignore[arg-type]
    assert error.value.problems[0].field == next(iter(settings))


def test_bad_input_names_field_and_row() -> None:
    planned = np.full((4, 2), 0.5)
    counts = np.full((4, 2), 10.0)
    with pytest.raises(InputError) as error:
        share_changepoints(np.full((4, 3), 10), planned, days(4), ARMS)
    assert error.value.problems[0].field == "counts"
    bad = counts.copy()
    bad[2, 1] = -1
    with pytest.raises(InputError) as error:
        share_changepoints(bad, planned, days(4), ARMS)
    assert (error.value.problems[0].field, error.value.problems[0].row) == ("counts", 2)
    zero_weight = planned.copy()
    zero_weight[1] = [1.0, 0.0]
    with pytest.raises(InputError) as error:
        share_changepoints(counts, zero_weight, days(4), ARMS)
    assert (error.value.problems[0].field, error.value.problems[0].row) == ("planned", 1)
    with pytest.raises(InputError) as error:
        share_changepoints(counts, planned, days(3), ARMS)
    assert error.value.problems[0].field == "dates"
    stats = np.ones((4, 2, 3))
    stats[3, 0, 1] = np.nan
    with pytest.raises(InputError) as error:
        engagement_changepoints(stats, days(4), ARMS)
    assert (error.value.problems[0].field, error.value.problems[0].row) == ("stats", 3)
