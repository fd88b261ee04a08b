"""POST /v1/experiments/{id}/reweight: naive vs cohort re-weighted estimates."""

from __future__ import annotations

import datetime as dt
import json
from typing import Any

import pandas as pd
import pytest
from apihelpers import DEMO_CSV, assert_problem, demo_csv_text, upload_csv

from detectors import AllocationSchedule, ObservationTable, diagnose, reweight
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
                      flagged_dates=list(flagged)).to_dict()
    assert response.json() == json.loads(json.dumps(direct))
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
    body = assert_problem(client.post(URL, json={"metric": "routes_saved"}), 422,
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
