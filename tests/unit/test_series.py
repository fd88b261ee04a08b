"""The dashboard series: daily shares, planned shares from the schedule, flags from diagnose."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pandas as pd
import pytest

from detectors import AllocationSchedule, ObservationTable, daily_series, diagnose

ARMS = ("control", "cards")
SOURCES = ("newsletter", "organic", "push")
START = dt.date(2026, 3, 2)
DAYS = 21
Ramped = tuple[ObservationTable, AllocationSchedule]


def _day(index: int) -> dt.date:
    return START + dt.timedelta(index)


@pytest.fixture(scope="module")
def ramped() -> Ramped:
    """A ramp 0.9/0.1 -> 0.7/0.3 -> 0.5/0.5 with a newsletter inflow into cards on day 15."""
    rng = np.random.default_rng(21)
    schedule = AllocationSchedule.from_steps(ARMS, [
        {"from": START.isoformat(), "weights": [0.9, 0.1]},
        {"from": _day(5).isoformat(), "weights": [0.7, 0.3]},
        {"from": _day(10).isoformat(), "weights": [0.5, 0.5]},
    ])
    planned = schedule.weights_on([_day(d) for d in range(DAYS)])
    totals = rng.poisson([400.0, 8000.0, 900.0], size=(DAYS, len(SOURCES)))
    entered = rng.multinomial(totals, planned[:, None, :]).transpose(0, 2, 1)
    entered[15, 1, 0] += 700
    entered[7] = 0  # an export gap: no units that day
    rows = pd.DataFrame([
        {"date": _day(d).isoformat(), "arm": arm, "source": source,
         "entered": int(entered[d, a, s]), "hikes.n": int(entered[d, a, s]),
         "hikes.sum": 1.5 * entered[d, a, s], "hikes.sum_sq": 4.0 * entered[d, a, s]}
        for d in range(DAYS) for a, arm in enumerate(ARMS) for s, source in enumerate(SOURCES)])
    return ObservationTable.from_frame(rows, ARMS), schedule


def test_observed_shares_sum_to_one_on_days_with_units(ramped: Ramped) -> None:
    table, schedule = ramped
    series = daily_series(table, schedule)
    assert series["arms"] == list(ARMS)
    assert series["dates"] == [_day(d).isoformat() for d in range(DAYS)]
    for index, day in enumerate(series["days"]):
        arms = day["arms"]
        entered = [arms[a]["entered"] for a in ARMS]
        assert entered == table.daily_totals[index].tolist()
        if sum(entered) == 0:
            assert all(arms[a]["observed_share"] is None for a in ARMS)
            assert all(arms[a]["engagement"]["hikes"] is None for a in ARMS)
            continue
        assert sum(arms[a]["observed_share"] for a in ARMS) == pytest.approx(1.0, abs=2e-6)
        for a in ARMS:
            assert arms[a]["observed_share"] == pytest.approx(arms[a]["entered"] / sum(entered),
                                                              abs=1e-6)
            assert arms[a]["engagement"]["hikes"] == pytest.approx(1.5)


def test_expected_shares_follow_the_schedule(ramped: Ramped) -> None:
    table, schedule = ramped
    series = daily_series(table, schedule)
    for index, day in enumerate(series["days"]):
        plan = [0.9, 0.1] if index < 5 else [0.7, 0.3] if index < 10 else [0.5, 0.5]
        total = sum(day["arms"][a]["entered"] for a in ARMS)
        for a, weight in zip(ARMS, plan, strict=True):
            assert day["arms"][a]["expected_share"] == pytest.approx(weight, abs=1e-9)
            assert day["arms"][a]["expected"] == pytest.approx(total * weight, abs=0.01)


def test_sources_carry_every_unit(ramped: Ramped) -> None:
    table, schedule = ramped
    series = daily_series(table, schedule)
    assert [s["source"] for s in series["sources"]] == list(SOURCES)
    for s, source in enumerate(series["sources"]):
        for a, arm in enumerate(ARMS):
            assert source["entered"][arm] == table.entered[:, a, s].tolist()
    total = sum(sum(v) for s in series["sources"] for v in s["entered"].values())
    assert total == int(table.entered.sum())
    assert series["metrics"] == ["hikes"]


def test_flagged_days_match_the_diagnosis(ramped: Ramped) -> None:
    table, schedule = ramped
    diagnosis = diagnose(table, schedule)
    assert diagnosis.alert_days == (_day(15),)
    series = daily_series(table, schedule, diagnosis)
    flagged = {d["date"]: d["severity"] for d in series["days"] if d["flagged"]}
    assert flagged == {f.date.isoformat(): f.severity for f in diagnosis.flagged_days}
    assert all(d["severity"] is None for d in series["days"] if not d["flagged"])
    unflagged = daily_series(table, schedule)
    assert not any(d["flagged"] for d in unflagged["days"])
    json.dumps(series, allow_nan=False)
