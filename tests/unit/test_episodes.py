"""Episodes: one per event, a shape per cause, one unit figure, outcome shifts as context.

Simulated (invented) Larkspur Trails traffic, seeded; one scenario per shape.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, replace

import numpy as np
import pytest

from benchmarks.simulate import Inflow, Scenario, simulate
from detectors import AllocationSchedule, ObservationTable, diagnose
from detectors.episode_finder import classify, episode_units

BASE = Scenario(metrics=("routes_saved",))
START = BASE.start_date


def _day(index: int) -> dt.date:
    return START + dt.timedelta(days=index)


def _run(scenario: Scenario, seed: int, declared: AllocationSchedule | None = None,
         **kwargs: object):
    sim = simulate(scenario, np.random.default_rng(seed))
    return sim, diagnose(sim.table, declared or sim.schedule, **kwargs)  # type: ignore[arg-type]


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_a_two_day_campaign_is_one_inflow_incident_with_every_finding(seed: int) -> None:
    sim, d = _run(BASE.with_inflows(Inflow(1, 12, 2, 0.2, label="reactivation_email")), seed)
    [episode] = d.episodes
    assert (episode.shape, episode.arm) == ("inflow", "cards")
    assert {episode.start, episode.end} <= {_day(11), _day(12), _day(13), _day(14)}
    assert episode.sources[0].source == "reactivation_email"
    # Every finding belongs to the one episode: one incident, not one per finding.
    assert {(f.kind, f.key) for f in d.findings()} == {(e.kind, e.key) for e in episode.evidence}
    assert len(d.findings()) >= 2
    # The figure: inflow units judged against the other arm, close to the units sent.
    sent = sim.inflow_units.sum()
    assert abs(episode.units - sent) < 0.15 * sent
    assert d.status == "alert" and "intent to treat" in " ".join(d.advice)


def test_unit_figure_is_one_formula_per_day_and_cell() -> None:
    _, d = _run(BASE.with_inflows(Inflow(1, 12, 2, 0.2, label="reactivation_email")), 4)
    [episode] = d.episodes
    assert episode.units == pytest.approx(sum(x.units for x in episode.daily))
    by_day: dict[dt.date, float] = {}
    for cell in episode.cells:
        by_day[cell.date] = by_day.get(cell.date, 0.0) + cell.units
    for day in episode.daily:
        assert by_day.get(day.date, 0.0) == pytest.approx(day.units, abs=0.1 * len(d.sources))
    flagged = {f.date: f.units for f in d.flagged_days}
    assert all(flagged[x.date] == pytest.approx(x.units) for x in episode.daily)


def test_units_formula_against_a_hand_computation() -> None:
    # One day, 60/40 plan, control 600 and cards 520 (common practice, no source: the units
    # that would have to leave cards alone for 600 : x to be 60 : 40 are 520 - 400 = 120).
    entered = np.array([[[600], [520]]])
    planned = np.array([[0.6, 0.4]])
    assert episode_units(entered, planned, 1, "inflow")[0, 0] == pytest.approx(120.0)
    # Moved units take the day's 1,120 as right: cards should hold 448, it holds 520.
    assert episode_units(entered, planned, 1, "allocation_step")[0, 0] == pytest.approx(72.0)


def test_units_lost_from_cards_are_a_shortfall_of_cards_not_an_inflow_into_control() -> None:
    sim = simulate(BASE, np.random.default_rng(9))
    entered = sim.table.entered.copy()
    rng = np.random.default_rng(10)
    entered[12:15, 1] = rng.binomial(entered[12:15, 1], 0.85)
    d = diagnose(replace(sim.table, entered=entered), sim.schedule)
    [episode] = d.episodes
    assert (episode.shape, episode.arm) == ("shortfall", "cards")
    assert episode.units < 0
    assert "campaign" not in " ".join(episode.advice)


def test_a_ramp_applied_late_is_an_allocation_step_with_observed_weights() -> None:
    actual = replace(BASE, allocation=((0, (0.9, 0.1)), (10, (0.5, 0.5))))
    declared = AllocationSchedule.from_steps(BASE.arms, [
        {"from": START, "weights": [0.9, 0.1]}, {"from": _day(7), "weights": [0.5, 0.5]}])
    _, d = _run(actual, 5, declared)
    [episode] = d.episodes
    assert episode.shape == "allocation_step"
    assert (episode.start, episode.end) == (_day(7), _day(9))
    assert episode.observed_weights is not None
    assert episode.observed_weights["control"] == pytest.approx(0.9, abs=0.02)
    assert not any("intent to treat" in a for a in episode.advice)


def test_a_steady_offset_from_day_one_is_persistent_not_an_inflow_on_some_week() -> None:
    scenario = replace(BASE, daily_units=2_000_000.0, allocation=((0, (0.5015, 0.4985)),))
    declared = AllocationSchedule.constant(BASE.arms, [0.5, 0.5], START)
    _, d = _run(scenario, 6, declared)
    [episode] = d.episodes
    assert episode.shape == "persistent"
    assert (episode.start, episode.end) == (_day(0), _day(27))
    assert episode.observed_weights is not None
    assert episode.observed_weights["control"] == pytest.approx(0.5015, abs=0.0005)
    assert "declared weights look wrong" in episode.advice[0]


def test_classify_names_the_arm_that_moved() -> None:
    counts = np.full((28, 3), [4000.0, 3000.0, 3000.0])
    mask = np.zeros(28, bool)
    mask[10:13] = True
    planned = np.full((28, 3), [0.4, 0.3, 0.3])
    lost = counts.copy()
    lost[10:13, 2] *= 0.8
    assert classify(lost, planned, 10, 12, mask) == ("shortfall", 2)
    gained = counts.copy()
    gained[10:13, 0] *= 1.2
    assert classify(gained, planned, 10, 12, mask) == ("inflow", 0)


def test_an_unlabelled_inflow_into_one_of_four_arms_names_that_arm() -> None:
    # Four arms at 25%: the other three arms' levels stay put while one rises; a robust
    # "median of the others" would let any arm look untouched.
    four = replace(BASE, arms=("control", "cards", "map_first", "photo_grid"),
                   allocation=((0, (0.25, 0.25, 0.25, 0.25)),), lifts=(0.0, 0.0, 0.0, 0.0),
                   daily_units=40_000.0, n_days=60)
    for seed in (20, 21, 22):
        _, d = _run(four.with_inflows(Inflow(2, 40, 2, 0.08)), seed)
        [episode] = d.episodes
        assert (episode.shape, episode.arm) == ("inflow", "map_first")


def test_a_novelty_effect_on_an_outcome_is_context_not_an_incident() -> None:
    sim = simulate(BASE, np.random.default_rng(12))
    cube = sim.table.metrics["routes_saved"].copy()
    cube[:7, 1, :, 1] *= 1.3   # cards' entrants 30% more engaged in week one
    cube[:7, 1, :, 2] *= 1.69
    d = diagnose(replace(sim.table, metrics={"routes_saved": cube}), sim.schedule)
    assert d.engagement_changepoints, "the outcome shift itself is still found"
    assert d.status == "healthy" and not d.episodes and not d.findings()
    assert not any("different population may have entered" in a for a in d.advice)
    assert any("novelty" in a for a in d.advice)


def test_an_outcome_shift_inside_an_inflow_is_shown_beside_it() -> None:
    _, d = _run(BASE.with_inflows(Inflow(1, 12, 3, 0.4, engagement=0.1)), 13)
    [episode] = d.episodes
    if d.engagement_changepoints:
        assert episode.context
    assert all(e.kind != "engagement_changepoint" for e in episode.evidence)


@dataclass(frozen=True)
class _Campaign:
    name: str
    source: str
    start: dt.date
    end: dt.date


def test_a_registered_campaign_explains_its_incident() -> None:
    sim = simulate(BASE.with_inflows(Inflow(1, 12, 2, 0.2, label="reactivation_email")),
                   np.random.default_rng(14))
    mail = _Campaign("spring-trails-mail", "reactivation_email", _day(12), _day(13))
    elsewhere = _Campaign("autumn-mail", "reactivation_email", _day(22), _day(23))
    d = diagnose(sim.table, sim.schedule, campaigns=[mail, elsewhere])
    [episode] = d.episodes
    assert episode.campaigns == ("spring-trails-mail",)
    assert "explained by the registered campaign spring-trails-mail" in episode.summary


def test_a_clean_small_experiment_says_what_could_have_gone_unseen() -> None:
    _, small = _run(replace(BASE, daily_units=300.0), 15)
    assert small.status == "healthy"
    assert small.unseen is not None
    assert "could have gone unseen" in small.unseen.text
    assert any("could have gone unseen" in a for a in small.advice)
    assert not any("follow the plan over the whole" in a for a in small.advice)
    _, large = _run(BASE, 15)
    assert large.unseen is None
    assert any("follow the plan" in a for a in large.advice)


def test_an_episode_that_grows_keeps_its_start_across_daily_looks() -> None:
    sim = simulate(BASE.with_inflows(Inflow(1, 12, 4, 0.2, label="reactivation_email")),
                   np.random.default_rng(16))
    starts = set()
    for look in range(13, 20):
        d = diagnose(sim.table, sim.schedule, as_of=_day(look))
        assert len(d.episodes) == 1
        starts.add(d.episodes[0].start)
    assert len(starts) == 1


def test_materiality_turns_an_alert_into_watch() -> None:
    sim = simulate(BASE.with_inflows(Inflow(1, 12, 2, 0.2, label="reactivation_email")),
                   np.random.default_rng(17))
    from detectors.episodes import MetricImpact

    def negligible(table: ObservationTable, schedule: AllocationSchedule):
        return lambda cells, arm: {"routes_saved": MetricImpact(0.0, 0.001, 0.1, 0.01)}

    def large(table: ObservationTable, schedule: AllocationSchedule):
        return lambda cells, arm: {"routes_saved": MetricImpact(0.1, 0.3, 0.1, 3.0)}

    quiet = diagnose(sim.table, sim.schedule, impact=negligible)
    assert quiet.status == "watch"
    assert not quiet.episodes[0].material and quiet.episodes[0].severity == "watch"
    loud = diagnose(sim.table, sim.schedule, impact=large)
    assert loud.status == "alert" and loud.episodes[0].material
