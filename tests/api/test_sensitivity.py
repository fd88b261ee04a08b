"""GET /v1/experiments/{id}/sensitivity, and the sensitivity line of ``inrush analyze``."""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

import numpy as np
import pytest
from apihelpers import DEMO_CSV, EXPERIMENT, assert_problem, demo_csv_text, upload_csv
from scipy import stats

from detectors import AllocationSchedule, DiagnosisConfig, ObservationTable
from detectors.sensitivity import sensitivity
from service.csvio import read_observations_csv
from service.demo import scenario

URL = "/v1/experiments/route-cards/sensitivity"


def direct(days: int) -> dict[str, Any]:
    """The detectors' answer on the demo file, as the diagnosis would see it."""
    table = ObservationTable.from_frame(read_observations_csv(DEMO_CSV), scenario.ARMS,
                                        start=scenario.START)
    schedule = AllocationSchedule.constant(scenario.ARMS, [0.5, 0.5], scenario.START)
    config = DiagnosisConfig()
    result = sensitivity(table.daily_totals, schedule.weights_on(table.dates), scenario.ARMS,
                         days=days, alpha=config.scan_alpha, max_window=config.max_window)
    return json.loads(json.dumps(result.to_dict()))


def test_answer_shape_and_default_days(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    response = client.get(URL)
    assert response.status_code == 200, response.text
    answer = response.json()
    assert answer["days"] == 2 and answer["window_days"] == 2
    assert answer["as_of"] == (scenario.START + dt.timedelta(days=scenario.DAYS - 1)).isoformat()
    assert [a["arm"] for a in answer["arms"]] == list(scenario.ARMS)
    for arm in answer["arms"]:
        assert set(arm) == {"arm", "units_per_day", "share_of_arm_traffic"}
        assert arm["units_per_day"] > 0 and 0 < arm["share_of_arm_traffic"] < 1
    whole = answer["whole_period"]
    assert whole["days"] == scenario.DAYS
    assert whole["relative_share_shift"] > 0 and whole["units"] > 0
    assert "Inrush flags an inflow held for 2 days" in answer["summary"]
    assert answer["caveats"]


@pytest.mark.parametrize("days", [1, 2, 5, 7, 31])
def test_figures_agree_with_the_detectors_on_the_stored_data(client: Any, experiment: Any,
                                                             days: int) -> None:
    upload_csv(client, demo_csv_text())
    answer = client.get(URL, params={"days": days}).json()
    assert answer.pop("as_of") == "2026-11-22"
    assert answer == direct(days)


def test_the_inflow_answered_has_the_stated_power(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    answer = client.get(URL, params={"days": 3}).json()
    # Independent check with scipy: Pearson's statistic on the 3-day window is noncentral
    # chi-square with noncentrality K x^2 (1 - w) / ((N + x) w) (Cohen 1988, ch. 7); at the
    # answered inflow x the window test at the answered level has 80% power.
    baseline = answer["baseline_units_per_day"]
    level = answer["level"]
    for arm in answer["arms"]:
        x, w = arm["units_per_day"], answer["weights"][arm["arm"]]
        noncentrality = 3 * x * x * (1 - w) / ((baseline + x) * w)
        power = stats.ncx2.sf(stats.chi2.isf(level, 1), 1, noncentrality)
        assert power == pytest.approx(0.8, abs=1e-3)
        assert arm["share_of_arm_traffic"] == pytest.approx(x / (baseline * w), rel=1e-3)


def test_a_ramp_uses_the_weights_in_force_on_the_last_day(client: Any) -> None:
    ramp = {**EXPERIMENT, "allocation": [{"from": "2026-10-26", "weights": [0.9, 0.1]},
                                         {"from": "2026-11-02", "weights": [0.5, 0.5]}]}
    assert client.post("/v1/experiments", json=ramp).status_code == 201
    rng = np.random.default_rng(7)
    rows = []
    for day in range(14):
        date = dt.date(2026, 10, 26) + dt.timedelta(days=day)
        weights = [0.9, 0.1] if day < 7 else [0.5, 0.5]
        for arm, units in zip(scenario.ARMS, rng.multinomial(4000, weights), strict=True):
            rows.append({"date": date.isoformat(), "arm": arm, "source": "organic",
                         "entered": int(units)})
    assert client.put("/v1/experiments/route-cards/observations",
                      json={"rows": rows}).status_code == 200
    answer = client.get(URL).json()
    assert answer["weights"] == {"control": 0.5, "cards": 0.5}
    counts = np.array([[r["entered"] for r in rows[i:i + 2]] for i in range(0, len(rows), 2)])
    planned = np.array([[0.9, 0.1]] * 7 + [[0.5, 0.5]] * 7)
    expected = sensitivity(counts, planned, scenario.ARMS, days=2,
                           alpha=DiagnosisConfig().scan_alpha).to_dict()
    assert {k: v for k, v in answer.items() if k != "as_of"} == json.loads(
        json.dumps(expected))


@pytest.mark.parametrize("days", ["0", "32", "-1", "two", "2.5"])
def test_days_out_of_range_is_422_naming_the_parameter(client: Any, experiment: Any,
                                                      days: str) -> None:
    upload_csv(client, demo_csv_text())
    body = assert_problem(client.get(URL, params={"days": days}), 422, "invalid-input")
    assert [(e["field"], e["in"]) for e in body["errors"]] == [("days", "query")]


def test_no_data_is_404_no_diagnosis(client: Any, experiment: Any) -> None:
    assert_problem(client.get(URL), 404, "no-diagnosis")
    empty = [{"date": "2026-10-26", "arm": arm, "source": "organic", "entered": 0}
             for arm in scenario.ARMS]
    assert client.put("/v1/experiments/route-cards/observations",
                      json={"rows": empty}).status_code == 200
    assert_problem(client.get(URL), 404, "no-diagnosis")
    assert_problem(client.get("/v1/experiments/nowhere/sensitivity"), 404, "not-found")


def test_needs_a_read_token(anonymous: Any, client: Any, experiment: Any,
                            token_for: Any) -> None:
    upload_csv(client, demo_csv_text())
    reader = {"Authorization": f"Bearer {token_for('read')}"}
    assert anonymous.get(URL, headers=reader).status_code == 200
    assert_problem(anonymous.get(URL, headers={"Authorization": ""}), 401)


def test_analyze_prints_the_same_sensitivity(client: Any, experiment: Any,
                                             capsys: pytest.CaptureFixture[str]) -> None:
    from service.cli import main

    upload_csv(client, demo_csv_text())
    served = client.get(URL).json()
    assert main(["analyze", str(DEMO_CSV), "--arms", "control,cards", "--json"]) == 0
    document = json.loads(capsys.readouterr().out)
    assert document["sensitivity"] == served
    assert main(["analyze", str(DEMO_CSV), "--arms", "control,cards"]) == 0
    report = capsys.readouterr().out
    assert "Sensitivity" in report and served["summary"] in " ".join(report.split())
