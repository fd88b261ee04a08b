"""Dates are ASCII YYYY-MM-DD wherever they enter: observation rows (JSON and CSV), experiment
start and allocation steps, campaigns, re-weighting exclusions and query parameters.
Full-width digits (２０２６) are refused with a 422 naming the field."""

from __future__ import annotations

from typing import Any

import pytest
from apihelpers import EXPERIMENT, assert_problem

FULL_WIDTH = "２０２６-１０-２６"
MIXED = "2026-10-2６"  # pandas' date parser took this one as 2026-10-26
URL = "/v1/experiments/route-cards"


@pytest.mark.parametrize("day", [FULL_WIDTH, MIXED])
def test_observation_dates(client: Any, experiment: Any, counts: Any, day: str) -> None:
    before = counts()
    row = {"date": day, "arm": "control", "source": "organic", "entered": 5}
    body = assert_problem(client.put(f"{URL}/observations", json={"rows": [row]}), 422)
    assert [(e["row"], e["field"]) for e in body["errors"]] == [(0, "date")]
    csv = f"date,arm,source,entered\n{day},control,organic,5\n"
    body = assert_problem(client.put(f"{URL}/observations", content=csv.encode(),
                                     headers={"Content-Type": "text/csv"}), 422)
    assert [(e["line"], e["field"]) for e in body["errors"]] == [(2, "date")]
    assert counts() == before


def test_experiment_and_campaign_dates(client: Any, experiment: Any) -> None:
    created = client.post("/v1/experiments", json={**EXPERIMENT, "id": "wide-digits",
                                                   "start_date": FULL_WIDTH})
    assert_problem(created, 422)
    step = {"from": FULL_WIDTH, "weights": [0.5, 0.5]}
    assert_problem(client.patch(URL, json={"allocation": [step]}), 422)
    campaign = {"name": "autumn", "source": "newsletter", "start": FULL_WIDTH,
                "end": "2026-10-27", "audience": {"cards": 1.0}}
    body = assert_problem(client.post(f"{URL}/campaigns", json=campaign), 422)
    assert any(e["field"] == "start" for e in body["errors"]), body
    body = assert_problem(client.post(f"{URL}/campaigns", json={**campaign, "start": MIXED}),
                          422)
    assert any(e["field"] == "start" for e in body["errors"]), body


def test_query_and_reweight_dates(client: Any, experiment: Any) -> None:
    row = {"date": "2026-10-26", "arm": "control", "source": "organic", "entered": 5,
           "metrics": {"km": {"n": 5, "sum": 10.0, "sum_sq": 30.0}}}
    rows = [row, {**row, "arm": "cards"}]
    assert client.put(f"{URL}/observations", json={"rows": rows}).status_code == 200
    for day in (FULL_WIDTH, MIXED):
        assert_problem(client.get(f"{URL}/observations", params={"from": day}), 422)
        assert_problem(client.get("/v1/alerts", params={"since": day}), 422)
    assert_problem(client.post(f"{URL}/reweight", json={
        "metric": "km", "exclude_dates": [FULL_WIDTH]}), 422)
