"""Bad input is refused with every problem named by field and row; good input loses nothing."""

from __future__ import annotations

import datetime as dt
from typing import Any

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from detectors import UNATTRIBUTED, AllocationSchedule, InputError, ObservationTable

ARMS = ["control", "cards"]


def _rows() -> dict[str, list[Any]]:
    """Three valid rows of the Larkspur Trails route-cards experiment with one metric."""
    return {
        "date": ["2026-03-02", "2026-03-02", "2026-03-03"],
        "arm": ["control", "cards", "control"],
        "source": ["organic", "organic", "newsletter"],
        "entered": [100, 104, 30],
        "hikes.n": [100, 104, 30],
        "hikes.sum": [150.0, 160.0, 20.0],
        "hikes.sum_sq": [400.0, 420.0, 40.0],
    }


def _problems(frame: pd.DataFrame | dict[str, list[Any]], **kwargs: Any
              ) -> list[tuple[int | None, str]]:
    with pytest.raises(InputError) as caught:
        ObservationTable.from_frame(pd.DataFrame(frame), ARMS, **kwargs)
    return [(p.row, p.field) for p in caught.value.problems]


def _with(row: int, column: str, value: Any) -> dict[str, list[Any]]:
    rows = _rows()
    rows[column] = [*rows[column]]
    rows[column][row] = value
    return rows


@pytest.mark.parametrize("value", [-3, 2.5, "abc", "", None, float("nan"), float("inf"),
                                   -float("inf"), True, 2**60])
def test_bad_entered_is_named_with_its_row(value: Any) -> None:
    assert _problems(_with(1, "entered", value)) == [(1, "entered")]


def test_boolean_column_of_counts_is_refused_on_every_row() -> None:
    rows = _rows()
    rows["entered"] = [True, False, True]
    rows.pop("hikes.n"), rows.pop("hikes.sum"), rows.pop("hikes.sum_sq")
    assert _problems(rows) == [(0, "entered"), (1, "entered"), (2, "entered")]


def test_unknown_or_missing_arm() -> None:
    assert _problems(_with(2, "arm", "treatment")) == [(2, "arm")]
    assert _problems(_with(0, "arm", None)) == [(0, "arm")]
    assert _problems(_with(0, "arm", "Control")) == [(0, "arm")]  # names are exact


@pytest.mark.parametrize("value", ["2026-02-30", "2026-13-01", "2026-03-32", "03/02/2026",
                                   "20260302", "2026-03-02T10:00", "2026-03-02 10:00",
                                   "yesterday", "", None])
def test_invalid_or_badly_written_date(value: Any) -> None:
    assert _problems(_with(1, "date", value)) == [(1, "date")]


def test_date_without_zero_padding_is_refused() -> None:
    assert _problems(_with(1, "date", "2026-3-2")) == [(1, "date")]


def test_dates_before_start_and_after_end() -> None:
    assert _problems(_rows(), start=dt.date(2026, 3, 3)) == [(0, "date"), (1, "date")]
    assert _problems(_rows(), end=dt.date(2026, 3, 2)) == [(2, "date")]


def test_duplicate_key_names_the_repeat() -> None:
    rows = _rows()
    for column in rows:
        rows[column].append(rows[column][1])
    assert _problems(rows) == [(3, "date,arm,source")]


def test_missing_source_and_unattributed_are_the_same_key() -> None:
    rows = {"date": ["2026-03-02"] * 3, "arm": ["cards"] * 3,
            "source": [None, "unattributed", " organic "], "entered": [1, 2, 3]}
    assert _problems(rows) == [(1, "date,arm,source")]


def test_metric_n_larger_than_entered() -> None:
    assert _problems(_with(0, "hikes.n", 101)) == [(0, "hikes.n")]


@pytest.mark.parametrize("value", [-1, 99.5])
def test_metric_n_must_be_a_whole_number(value: float) -> None:
    assert _problems(_with(0, "hikes.n", value)) == [(0, "hikes.n")]


def test_sum_sq_below_what_any_numbers_can_give() -> None:
    # 104 values summing to 160 have sum of squares >= 160^2 / 104 = 246.15 (Cauchy-Schwarz).
    assert _problems(_with(1, "hikes.sum_sq", 246.0)) == [(1, "hikes.sum_sq")]
    rows = _with(1, "hikes.sum_sq", 160.0**2 / 104)  # exactly the floor is possible
    assert ObservationTable.from_frame(pd.DataFrame(rows), ARMS).metrics["hikes"].shape[-1] == 3


@pytest.mark.parametrize("column", ["hikes.n", "hikes.sum", "hikes.sum_sq"])
def test_partial_metric_stats(column: str) -> None:
    assert _problems(_with(2, column, None)) == [(2, "hikes")]


@pytest.mark.parametrize("value", [float("nan"), float("inf")])
def test_non_finite_metric_stats(value: Any) -> None:
    assert _problems(_with(0, "hikes.sum", value)) == [(0, "hikes")]


def test_text_in_a_metric_statistic_is_named_in_its_column() -> None:
    assert _problems(_with(0, "hikes.sum", "lots")) == [(0, "hikes.sum")]


def test_metric_with_n_zero_must_have_zero_sums() -> None:
    rows = _with(0, "hikes.n", 0)
    assert _problems(rows) == [(0, "hikes")]


def test_metric_absent_on_a_row_counts_as_no_measurement() -> None:
    rows = _rows()
    for stat in ("n", "sum", "sum_sq"):
        rows[f"hikes.{stat}"][2] = None
    table = ObservationTable.from_frame(pd.DataFrame(rows), ARMS)
    assert table.metrics["hikes"][1, 0].sum() == 0.0
    assert table.entered[1, 0].sum() == 30


def test_records_with_partial_metric_stats() -> None:
    rows = [{"date": "2026-03-02", "arm": "control", "entered": 5},
            {"date": "2026-03-02", "arm": "cards", "entered": 5, "metrics": {"hikes": {"n": 5}}}]
    with pytest.raises(InputError) as caught:
        ObservationTable.from_records(rows, ARMS)
    assert [(p.row, p.field) for p in caught.value.problems] == [(1, "hikes")]


def test_missing_metric_column() -> None:
    rows = _rows()
    rows.pop("hikes.sum_sq")
    assert _problems(rows) == [(None, "hikes.sum_sq")]


def test_bad_metric_name() -> None:
    rows = {"date": ["2026-03-02"], "arm": ["cards"], "entered": [1],
            "9lives.n": [1], "9lives.sum": [1.0], "9lives.sum_sq": [1.0]}
    assert _problems(rows) == [(None, "9lives")]


@pytest.mark.parametrize("column", ["date", "arm", "entered"])
def test_missing_required_column(column: str) -> None:
    rows = _rows()
    rows.pop(column)
    assert _problems(rows) == [(None, column)]


def test_empty_input() -> None:
    assert _problems(pd.DataFrame(columns=["date", "arm", "source", "entered"])) == \
        [(None, "rows")]
    with pytest.raises(InputError) as caught:
        ObservationTable.from_records([], ARMS)
    assert caught.value.problems[0].field == "rows"


def test_every_problem_is_listed_in_row_order_and_message_names_them() -> None:
    rows = _rows()
    rows["entered"] = [-1, 104, "x"]
    rows["arm"] = ["control", "nope", "control"]
    rows["date"] = ["2026-03-02", "2026-03-02", "2026-02-30"]
    with pytest.raises(InputError) as caught:
        ObservationTable.from_frame(pd.DataFrame(rows), ARMS)
    found = [(p.row, p.field) for p in caught.value.problems]
    assert found == [(0, "entered"), (1, "arm"), (2, "date"), (2, "entered")]
    assert "row 0, entered" in str(caught.value)
    assert "row 2, date" in str(caught.value)
    assert all(p.as_dict()["message"] for p in caught.value.problems)


def test_rows_are_positions_not_index_labels() -> None:
    frame = pd.DataFrame(_with(1, "entered", -5), index=[40, 41, 42])
    assert _problems(frame) == [(1, "entered")]


# --- nothing silently dropped ---------------------------------------------------------------


def test_valid_table_keeps_every_unit_and_fills_gaps_with_zeros() -> None:
    rows = {"date": ["2026-03-02", "2026-03-05", "2026-03-05", "2026-03-02"],
            "arm": ["control", "cards", "control", "cards"],
            "source": ["organic", None, "push", ""], "entered": ["7", 3, 2.0, 4]}
    table = ObservationTable.from_frame(pd.DataFrame(rows), ARMS, start=dt.date(2026, 3, 1),
                                        end=dt.date(2026, 3, 7))
    assert table.arms == tuple(ARMS)
    assert table.sources == ("organic", "push", UNATTRIBUTED)
    assert [d.isoformat() for d in table.date_list()] == \
        [f"2026-03-0{i}" for i in range(1, 8)]
    assert table.entered.dtype == np.int64
    assert table.entered.sum() == 16
    assert table.entered[1, 0, 0] == 7 and table.entered[1, 1, 2] == 4
    assert table.entered[4, 1, 2] == 3 and table.entered[4, 0, 1] == 2
    assert table.daily_totals[[0, 2, 3, 5, 6]].sum() == 0


row_strategy = st.fixed_dictionaries({
    "day": st.integers(0, 20),
    "arm": st.sampled_from(["control", "cards", "map"]),
    "source": st.sampled_from(["organic", "newsletter", "push", "paid_search", None]),
    "entered": st.integers(0, 10**9),
    "n_share": st.floats(0, 1),
    "mean": st.floats(-1e3, 1e3),
    "spread": st.floats(0, 1e3),
})


@settings(max_examples=60, deadline=None)
@given(st.lists(row_strategy, min_size=1, max_size=60))
def test_totals_equal_the_input_sums(raw: list[dict[str, Any]]) -> None:
    # Keep the first row of each key (the rest would rightly be refused as duplicates).
    seen: set[tuple[int, str, str]] = set()
    rows = []
    for item in raw:
        key = (item["day"], item["arm"], item["source"] or UNATTRIBUTED)
        if key in seen:
            continue
        seen.add(key)
        n = int(item["entered"] * item["n_share"])
        total = n * item["mean"]
        rows.append({"date": (dt.date(2026, 3, 1) + dt.timedelta(item["day"])).isoformat(),
                     "arm": item["arm"], "source": item["source"], "entered": item["entered"],
                     "hikes.n": n, "hikes.sum": total,
                     "hikes.sum_sq": (total * total / n if n else 0.0) + n * item["spread"]})
    frame = pd.DataFrame(rows)
    table = ObservationTable.from_frame(frame, ["control", "cards", "map"])
    assert table.entered.sum() == frame["entered"].sum()
    frame["source"] = frame["source"].fillna(UNATTRIBUTED)
    by_arm_source = frame.groupby(["arm", "source"])["entered"].sum()
    for (arm, source), total in by_arm_source.items():
        cell = table.entered[:, table.arms.index(arm), table.sources.index(source)]
        assert cell.sum() == total
    by_day = frame.groupby("date")["entered"].sum()
    for date, total in by_day.items():
        day = table.date_list().index(dt.date.fromisoformat(date))
        assert table.daily_totals[day].sum() == total
    cube = table.metrics["hikes"]
    np.testing.assert_allclose(cube[..., 0].sum(), frame["hikes.n"].sum())
    np.testing.assert_allclose(cube[..., 1].sum(), frame["hikes.sum"].sum(), rtol=1e-9,
                               atol=1e-6)


# --- allocation schedules -------------------------------------------------------------------


def _schedule_problems(arms: list[str], steps: list[Any]) -> list[tuple[int | None, str]]:
    with pytest.raises(InputError) as caught:
        AllocationSchedule.from_steps(arms, steps)
    return [(p.row, p.field) for p in caught.value.problems]


@pytest.mark.parametrize("weights", [[0.5, 0.6], [0.3, 0.3], [0.5, 0.5 + 1e-8]])
def test_weights_must_sum_to_one(weights: list[float]) -> None:
    assert _schedule_problems(ARMS, [{"from": "2026-03-01", "weights": weights}]) == \
        [(None, "allocation[0].weights")]


def test_weights_sum_tolerance_is_1e9() -> None:
    schedule = AllocationSchedule.from_steps(
        ARMS, [{"from": "2026-03-01", "weights": [0.5, 0.5 + 5e-10]}])
    assert schedule.steps[0].weights == (0.5, 0.5 + 5e-10)


@pytest.mark.parametrize("weights", [[1.0, 0.0], [1.2, -0.2], [float("nan"), 0.5],
                                     [float("inf"), 0.5]])
def test_weights_must_be_positive(weights: list[float]) -> None:
    assert _schedule_problems(ARMS, [{"from": "2026-03-01", "weights": [0.5, 0.5]},
                                     {"from": "2026-03-08", "weights": weights}]) == \
        [(None, "allocation[1].weights")]


@pytest.mark.parametrize("weights", [[1.0], [0.2, 0.3, 0.5], []])
def test_one_weight_per_arm(weights: list[float]) -> None:
    assert _schedule_problems(ARMS, [{"from": "2026-03-01", "weights": weights}]) == \
        [(None, "allocation[0].weights")]


def test_weights_by_arm_name_must_name_every_arm() -> None:
    assert _schedule_problems(ARMS, [{"from": "2026-03-01",
                                      "weights": {"control": 0.5, "map": 0.5}}]) == \
        [(None, "allocation[0].weights")]
    by_name = AllocationSchedule.from_steps(
        ARMS, [{"from": "2026-03-01", "weights": {"cards": 0.3, "control": 0.7}}])
    assert by_name.steps[0].weights == (0.7, 0.3)


@pytest.mark.parametrize("weights", ["0.5,0.5", None, ["half", "half"]])
def test_weights_must_be_numbers(weights: Any) -> None:
    assert _schedule_problems(ARMS, [{"from": "2026-03-01", "weights": weights}]) == \
        [(None, "allocation[0].weights")]


def test_duplicate_step_dates() -> None:
    steps = [{"from": "2026-03-01", "weights": [0.9, 0.1]},
             {"from": "2026-03-01", "weights": [0.5, 0.5]}]
    assert _schedule_problems(ARMS, steps) == [(None, "allocation")]


@pytest.mark.parametrize("start", ["2026-02-30", "03/01/2026", None])
def test_bad_step_date(start: Any) -> None:
    assert _schedule_problems(ARMS, [{"from": start, "weights": [0.5, 0.5]}]) == \
        [(None, "allocation[0].from")]
    assert _schedule_problems(ARMS, [{"weights": [0.5, 0.5]}]) == [(None, "allocation[0].from")]


def test_schedule_needs_steps_and_two_distinct_arms() -> None:
    assert _schedule_problems(ARMS, []) == [(None, "allocation")]
    assert _schedule_problems(["control"], [{"from": "2026-03-01", "weights": [1.0]}]) == \
        [(None, "arms")]
    assert (None, "arms") in _schedule_problems(
        ["cards", "cards"], [{"from": "2026-03-01", "weights": [0.5, 0.5]}])


def test_ramp_weights_on_each_day() -> None:
    # Steps given out of order are sorted; a step holds from its date (inclusive).
    schedule = AllocationSchedule.from_steps(ARMS, [
        {"from": "2026-03-15", "weights": [0.5, 0.5]},
        {"from": dt.date(2026, 3, 1), "weights": [0.9, 0.1]},
        {"from": "2026-03-08", "weights": [0.8, 0.2]},
    ])
    assert schedule.change_dates() == [dt.date(2026, 3, 8), dt.date(2026, 3, 15)]
    days = [dt.date(2026, 2, 20), dt.date(2026, 3, 1), dt.date(2026, 3, 7),
            dt.date(2026, 3, 8), dt.date(2026, 3, 14), dt.date(2026, 3, 15),
            dt.date(2026, 6, 1)]
    expected = [[0.9, 0.1], [0.9, 0.1], [0.9, 0.1], [0.8, 0.2], [0.8, 0.2], [0.5, 0.5],
                [0.5, 0.5]]
    assert schedule.weights_on(days).tolist() == expected
    as_numpy = np.array([d.isoformat() for d in days], dtype="datetime64[D]")
    assert schedule.weights_on(as_numpy).tolist() == expected
    assert schedule.to_steps()[0] == {"from": "2026-03-01", "weights": [0.9, 0.1]}
    again = AllocationSchedule.from_steps(ARMS, schedule.to_steps())
    assert again == schedule


def test_constant_schedule_defaults_to_equal_weights() -> None:
    schedule = AllocationSchedule.constant(["control", "cards", "map"])
    weights = schedule.weights_on([dt.date(2026, 3, 1)])
    np.testing.assert_allclose(weights, [[1 / 3, 1 / 3, 1 / 3]])
    assert schedule.change_dates() == []


@pytest.mark.parametrize("dates", [
    pd.to_datetime(["2026-03-02", "2026-03-02", "2026-03-03"]),
    [dt.date(2026, 3, 2), dt.date(2026, 3, 2), dt.date(2026, 3, 3)],
])
def test_date_columns_already_parsed_are_accepted(dates: Any) -> None:
    rows = _rows()
    rows["date"] = list(dates)
    table = ObservationTable.from_frame(pd.DataFrame(rows), ARMS)
    assert table.date_list() == [dt.date(2026, 3, 2), dt.date(2026, 3, 3)]
    assert table.entered.sum() == 234
