"""Campaign pre-flight check: balanced vs unbalanced audiences, ramps, three arms, bad input."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pytest

from detectors.allocation import AllocationSchedule
from detectors.campaigns import Campaign, check_campaign
from detectors.diagnose import KnownCampaign
from detectors.errors import InputError
from detectors.srm import expected_counts

ARMS = ["control", "cards"]
RAMP = AllocationSchedule.from_steps(ARMS, [
    {"from": "2026-03-01", "weights": [0.9, 0.1]},
    {"from": "2026-03-08", "weights": [0.5, 0.5]},
])


def _campaign(audience: dict[str, float], size: int | None = 4000, *,
              start: str = "2026-03-06", end: str = "2026-03-09") -> Campaign:
    return Campaign("spring-routes", "newsletter", start, end, audience, size)


def _sums_to_zero(check) -> None:
    for day, per_arm in check.expected_excess.items():
        assert sum(per_arm.values()) == pytest.approx(0.0, abs=1e-9), day


def test_campaign_satisfies_the_diagnosis_protocol() -> None:
    campaign = _campaign({"cards": 1.0})
    known: KnownCampaign = campaign
    assert known.start == dt.date(2026, 3, 6) and known.end == dt.date(2026, 3, 9)
    assert campaign.days == 4


def test_balanced_even_split_causes_no_excess() -> None:
    check = check_campaign(_campaign({"control": 0.3, "cards": 0.3}),
                           AllocationSchedule.constant(ARMS), ARMS)
    assert check.balanced and check.fix is None and check.warnings == ()
    assert all(v == pytest.approx(0.0, abs=1e-9)
               for day in check.expected_excess.values() for v in day.values())


def test_only_treatment_reached_warns_with_arms_excess_and_fix() -> None:
    check = check_campaign(_campaign({"cards": 1.0, "control": 0.0}),
                           AllocationSchedule.constant(ARMS), ARMS)
    assert not check.balanced
    # Worked by hand (no source): every arrival lands in cards, plan expects half there.
    assert check.expected_excess["2026-03-06"] == {"control": -500.0, "cards": 500.0}
    text = " ".join(check.warnings)
    assert "100% of cards' units and 0% of control's" in text
    assert "+2,000" in text and "-2,000" in text
    assert "log who would have been targeted in every arm" in check.fix
    assert "intent to treat" in check.fix
    _sums_to_zero(check)


def test_ramp_balanced_campaign_follows_each_days_weights() -> None:
    check = check_campaign(_campaign({"control": 0.4, "cards": 0.4}), RAMP, ARMS)
    assert check.balanced and check.warnings == ()
    assert check.arrival_shares["2026-03-07"] == pytest.approx({"control": 0.9, "cards": 0.1})
    assert check.arrival_shares["2026-03-08"] == pytest.approx({"control": 0.5, "cards": 0.5})
    _sums_to_zero(check)


def test_ramp_unbalanced_campaign_excess_changes_with_the_step() -> None:
    check = check_campaign(_campaign({"cards": 1.0}), RAMP, ARMS)
    # Worked by hand (no source): 1,000 arrivals a day all in cards; the plan expects 10% of
    # them there before the step (excess +900) and 50% after it (+500).
    assert check.expected_excess["2026-03-07"]["cards"] == pytest.approx(900.0)
    assert check.expected_excess["2026-03-08"]["cards"] == pytest.approx(500.0)
    assert check.total_excess["cards"] == pytest.approx(2800.0)
    _sums_to_zero(check)


def test_partially_unequal_audience_on_a_ramp() -> None:
    check = check_campaign(_campaign({"control": 0.2, "cards": 0.6}, size=None), RAMP, ARMS)
    assert not check.balanced and check.size_basis == "unknown" and check.size_per_day is None
    # Per 1,000 arrivals before the step: cards gets 0.6*0.1 / (0.2*0.9 + 0.6*0.1) = 25%,
    # 15 points over its 10% plan (worked by hand, no source).
    assert check.expected_excess["2026-03-06"]["cards"] == pytest.approx(1000 * (0.25 - 0.1))
    assert any("size is unknown" in w for w in check.warnings)
    _sums_to_zero(check)


def test_three_arms_names_every_arm_and_estimates_size_from_traffic() -> None:
    arms = ["control", "cards", "map"]
    schedule = AllocationSchedule.constant(arms, [0.5, 0.25, 0.25])
    traffic = np.tile([2000, 1000, 1000], (20, 1))
    traffic[:5] = 0  # days without units do not dilute the recent mean
    check = check_campaign(_campaign({"control": 0.0, "cards": 1.0, "map": 0.5}, size=None),
                           schedule, arms, traffic)
    assert check.size_basis == "recent_traffic"
    assert check.size_per_day == pytest.approx(1000 * 1.0 + 1000 * 0.5)
    text = " ".join(check.warnings)
    assert "100% of cards' units, 50% of map's units and 0% of control's" in text
    # reached shares 0 : 0.25 : 0.125 -> arrivals 0, 2/3, 1/3 against plan 0.5, 0.25, 0.25
    day = check.expected_excess["2026-03-06"]
    assert day["cards"] == pytest.approx(1500 * (2 / 3 - 0.25))
    assert day["map"] == pytest.approx(1500 * (1 / 3 - 0.25))
    assert day["control"] == pytest.approx(-1500 * 0.5)
    _sums_to_zero(check)

    balanced = check_campaign(_campaign({a: 0.7 for a in arms}), schedule, arms)
    assert balanced.balanced and balanced.fix is None


def test_expected_excess_matches_a_simulated_campaign() -> None:
    """Simulation: units are assigned by the weights, the campaign reaches each arm's units
    with its audience share, and the reached units arrive; the mean of observed - expected
    (the chi-square test's expectation, ``detectors.srm.expected_counts``) must match."""
    rng = np.random.default_rng(7)
    weights = np.array([0.7, 0.3])
    audience = {"control": 0.25, "cards": 0.9}
    schedule = AllocationSchedule.constant(ARMS, weights.tolist())
    pool, reps = 20_000, 400
    assigned = rng.multinomial(pool, weights, size=reps)
    arrivals = rng.binomial(assigned, [audience["control"], audience["cards"]])
    excess = arrivals - expected_counts(arrivals, np.tile(weights, (reps, 1)))
    size = round(float(arrivals.sum(axis=1).mean()))
    check = check_campaign(_campaign(audience, size, end="2026-03-06"), schedule, ARMS)
    predicted = check.expected_excess["2026-03-06"]
    standard_error = excess[:, 1].std(ddof=1) / np.sqrt(reps)
    assert abs(excess[:, 1].mean() - predicted["cards"]) < 4 * standard_error + 1.0


def test_invalid_campaigns_name_the_field() -> None:
    def fields(**changes: object) -> list[str]:
        values: dict[str, object] = {"name": "spring-routes", "source": "newsletter",
                                     "start": "2026-03-06", "end": "2026-03-09",
                                     "audience": {"cards": 1.0}}
        values.update(changes)
        with pytest.raises(InputError) as error:
            Campaign(**values)  # type: ignore[arg-type]
        return [p.field for p in error.value.problems]

    assert fields(audience={"cards": 1.5}) == ["audience.cards"]
    assert fields(audience={"cards": -0.1, "control": float("nan")}) == ["audience.cards",
                                                                         "audience.control"]
    assert fields(end="2026-03-01") == ["end"]
    assert fields(start="March 6") == ["start"]
    assert fields(audience={"cards": 0.0, "control": 0.0}) == ["audience"]
    assert fields(expected_size=0) == ["expected_size"]
    assert fields(name="") == ["name"]


def test_unknown_arm_and_mismatched_inputs_are_rejected() -> None:
    schedule = AllocationSchedule.constant(ARMS)
    with pytest.raises(InputError) as error:
        check_campaign(_campaign({"cards": 1.0, "kards": 1.0}), schedule, ARMS)
    assert [p.field for p in error.value.problems] == ["audience.kards"]
    with pytest.raises(InputError) as error:
        check_campaign(_campaign({"cards": 1.0}), schedule, ["control", "map"])
    assert "arms" in [p.field for p in error.value.problems]
    with pytest.raises(InputError) as error:
        check_campaign(_campaign({"cards": 1.0}, None), schedule, ARMS, np.ones((3, 3)))
    assert [p.field for p in error.value.problems] == ["daily_arm_traffic"]


def test_to_dict_is_json_safe() -> None:
    import json

    check = check_campaign(_campaign({"cards": 1.0}, None), RAMP, ARMS)
    document = json.loads(json.dumps(check.to_dict()))
    assert document["excess_unit"] == "per_1000_arrivals"
    assert set(document["expected_excess"]) == {"2026-03-06", "2026-03-07", "2026-03-08",
                                                "2026-03-09"}
