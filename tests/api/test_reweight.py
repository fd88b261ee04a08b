"""POST /v1/experiments/{id}/reweight: naive vs cohort re-weighted estimates."""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

import pandas as pd
import pytest
from apihelpers import DEMO_CSV, assert_problem, demo_csv_text, upload_csv

from detectors import AllocationSchedule, ObservationTable, diagnose, reweight
from detectors.contamination import cells_from_document
from detectors.honest import attach_bounds, honest_effect
from service.csvio import read_observations_csv
from service.demo import scenario

URL = "/v1/experiments/route-cards/reweight"


def test_answer_is_the_detectors_reweighting_with_the_diagnosis_window(
        client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    response = client.post(URL, json={"metric": "routes_saved", "target": "reference_arm",
                                      "by": ["source", "window"]})
    assert response.status_code == 200, response.text
    table = ObservationTable.from_frame(read_observations_csv(DEMO_CSV), scenario.ARMS)
    schedule = AllocationSchedule.constant(scenario.ARMS, [0.5, 0.5], scenario.START)
    flagged = diagnose(table, schedule).alert_days
    assert set(flagged) == {scenario.START + dt.timedelta(days=d)
                            for d in scenario.CAMPAIGN_DAYS}
    direct = reweight(table, "routes_saved", target="reference_arm", weights=None,
                      by=("source", "window"), exclude_sources=[], exclude_dates=[],
                      flagged_dates=list(flagged))
    cells = cells_from_document(diagnose(table, schedule).to_dict())
    assert cells
    expected = attach_bounds(direct, table, cells, schedule).to_dict()
    expected["default"] = None
    assert response.json() == json.loads(json.dumps(expected))
    assert response.json()["caveats"]


def test_naive_estimate_is_the_plain_difference_of_means(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    answer = client.post(URL, json={"metric": "routes_saved"}).json()
    comparison = next(c for c in answer["comparisons"] if c["arm"] == "cards")
    # Independent arithmetic with pandas: per-arm mean = total sum / total n.
    frame = pd.read_csv(DEMO_CSV).groupby("arm")[["routes_saved.n", "routes_saved.sum"]].sum()
    means = frame["routes_saved.sum"] / frame["routes_saved.n"]
    assert comparison["naive"]["reference_mean"] == pytest.approx(means["control"], rel=1e-9)
    assert comparison["naive"]["arm_mean"] == pytest.approx(means["cards"], rel=1e-9)
    assert comparison["naive"]["difference"] == pytest.approx(
        means["cards"] - means["control"], rel=1e-9)


def test_a_cohort_missing_from_an_arm_is_422_naming_it(client: Any, experiment: Any,
                                                       counts: Any) -> None:
    rows = []
    for arm in scenario.ARMS:
        for source in ("organic", "push"):
            rows.append({"date": "2026-10-26", "arm": arm, "source": source, "entered": 400,
                         "metrics": {"routes_saved": {"n": 400, "sum": 900, "sum_sq": 2600}}})
    rows.append({"date": "2026-10-26", "arm": "control", "source": "partner", "entered": 50,
                 "metrics": {"routes_saved": {"n": 50, "sum": 100, "sum_sq": 260}}})
    assert client.put("/v1/experiments/route-cards/observations",
                      json={"rows": rows}).status_code == 200
    before = counts()
    body = assert_problem(client.post(URL, json={"metric": "routes_saved",
                                                 "target": "reference_arm"}), 422,
                          "undefined-estimate")
    assert "partner" in body["cohort"]
    assert body["arm"] == "cards"
    assert counts() == before


@pytest.mark.parametrize(("request_body", "field"), [
    ({"metric": "sessions"}, "metric"),
    ({"metric": "routes_saved", "target": "custom"}, "body"),
    ({"metric": "routes_saved", "weights": {"organic": 1.0}}, "body"),
    ({"metric": "routes_saved", "by": ["window"]}, "body"),
    ({"metric": "routes_saved", "target": "everyone"}, "target"),
    ({"metric": "routes_saved", "exclude_dates": ["2026-13-01"]}, "exclude_dates[0]"),
    ({"metric": "routes_saved", "colour": "red"}, "colour"),
])
def test_invalid_requests_are_422(client: Any, experiment: Any, counts: Any,
                                  request_body: dict[str, Any], field: str) -> None:
    upload_csv(client, demo_csv_text())
    before = counts()
    body = assert_problem(client.post(URL, json=request_body), 422)
    assert field in {e["field"] for e in body["errors"]}, body["errors"]
    assert counts() == before


def test_nothing_to_reweight_before_data(client: Any, experiment: Any) -> None:
    assert_problem(client.post(URL, json={"metric": "routes_saved"}), 404, "no-diagnosis")
    assert_problem(client.post("/v1/experiments/nope/reweight",
                               json={"metric": "routes_saved"}), 404, "not-found")


def test_default_is_the_honest_estimate_without_the_flagged_cells(
        client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    answer = client.post(URL, json={"metric": "routes_saved"}).json()
    table = ObservationTable.from_frame(read_observations_csv(DEMO_CSV), scenario.ARMS)
    schedule = AllocationSchedule.constant(scenario.ARMS, [0.5, 0.5], scenario.START)
    cells = cells_from_document(diagnose(table, schedule).to_dict())
    expected = honest_effect(table, "routes_saved", cells, schedule).to_dict()
    default = answer.pop("default")
    assert answer == json.loads(json.dumps(expected))
    assert default["target"] == "uncontaminated" and default["by"] == ["source"]
    campaign_days = {(scenario.START + dt.timedelta(days=d)).isoformat()
                     for d in scenario.CAMPAIGN_DAYS}
    assert {c["date"] for c in default["excluded_cells"]} == campaign_days
    assert {c["arm"] for c in default["excluded_cells"]} == {"cards"}
    assert "leaves those cells out" in default["reason"]
    (cards,) = answer["comparisons"]
    bounds = cards["bounds"]
    assert bounds["ci_low"] <= bounds["low"] <= bounds["high"] <= bounds["ci_high"]
    assert bounds["low"] <= cards["adjusted"]["difference"] <= bounds["high"]
    assert set(cards["relative_bounds"]) == {"low", "high", "ci_low", "ci_high"}


def test_default_drops_a_cohort_missing_from_an_arm_and_says_so(
        client: Any, experiment: Any) -> None:
    rows = []
    for arm in scenario.ARMS:
        for source in ("organic", "push"):
            rows.append({"date": "2026-10-26", "arm": arm, "source": source, "entered": 400,
                         "metrics": {"routes_saved": {"n": 400, "sum": 900, "sum_sq": 2600}}})
    rows.append({"date": "2026-10-26", "arm": "control", "source": "partner", "entered": 50,
                 "metrics": {"routes_saved": {"n": 50, "sum": 100, "sum_sq": 260}}})
    assert client.put("/v1/experiments/route-cards/observations",
                      json={"rows": rows}).status_code == 200
    answer = client.post(URL, json={"metric": "routes_saved"}).json()
    assert answer["default"]["excluded_cells"] == []
    assert "no cell as contaminated" in answer["default"]["reason"]
    partner = next(c for c in answer["cohorts"] if c["cohort"] == "partner")
    assert partner["weight"] == 0
    assert any("partner" in c and "left out" in c for c in answer["caveats"])


def test_explicit_uncontaminated_target_takes_no_cohort_options(
        client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    ok = client.post(URL, json={"metric": "routes_saved", "target": "uncontaminated"})
    assert ok.status_code == 200 and ok.json()["default"] is None
    assert ok.json()["target"] == "uncontaminated"
    assert_problem(client.post(URL, json={"metric": "routes_saved", "target": "uncontaminated",
                                          "by": ["source", "window"]}), 422)


def test_default_estimates_within_allocation_periods_after_a_ramp(
        client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    table = ObservationTable.from_frame(read_observations_csv(DEMO_CSV), scenario.ARMS)
    ramp = scenario.START + dt.timedelta(days=7)
    # A new schedule step (the demo's traffic stays 50/50, so the step adds no incident).
    steps = [{"from": scenario.START.isoformat(), "weights": [0.5, 0.5]},
             {"from": ramp.isoformat(), "weights": [0.5, 0.5]}]
    assert client.patch("/v1/experiments/route-cards",
                        json={"allocation": steps}).status_code == 200
    answer = client.post(URL, json={"metric": "routes_saved"}).json()
    assert answer["by"] == ["period", "source"] == answer["default"]["by"]
    assert {c["cohort"].split("|")[0] for c in answer["cohorts"]} == {
        f"from {scenario.START.isoformat()}", f"from {ramp.isoformat()}"}
    assert any("Simpson" in c for c in answer["caveats"])
    schedule = AllocationSchedule.from_steps(scenario.ARMS, steps)
    document = client.get("/v1/experiments/route-cards/diagnosis").json()
    expected = honest_effect(table, "routes_saved", cells_from_document(document), schedule)
    assert answer["comparisons"] == json.loads(json.dumps(expected.to_dict()["comparisons"]))
