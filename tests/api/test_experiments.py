"""POST/GET/PATCH /v1/experiments."""

from __future__ import annotations

from typing import Any

import pytest
from apihelpers import EXPERIMENT, assert_problem


def test_create_returns_the_experiment_and_its_location(client: Any) -> None:
    response = client.post("/v1/experiments", json={**EXPERIMENT, "notify": {
        "webhook_url": "https://hooks.example.test/inrush", "secret": "s3cret-value"}})
    assert response.status_code == 201, response.text
    body = response.json()
    assert response.headers["location"].endswith("/v1/experiments/route-cards")
    assert body["id"] == "route-cards"
    assert body["arms"] == ["control", "cards"]
    assert body["allocation"] == [{"from": "2026-10-26", "weights": [0.5, 0.5]}]
    assert body["notify"] == {"webhook_url": "https://hooks.example.test/inrush",
                              "has_secret": True}
    assert "s3cret-value" not in response.text
    assert body["diagnosis"] is None
    assert body["links"]["diagnosis"].endswith("/v1/experiments/route-cards/diagnosis")


def test_allocation_defaults_to_equal_weights_from_the_start(client: Any) -> None:
    response = client.post("/v1/experiments", json={
        "id": "three-arms", "start_date": "2026-03-01", "arms": ["a", "b", "c"]})
    assert response.status_code == 201, response.text
    body = response.json()
    assert body["title"] == "three-arms"
    assert body["allocation"][0]["from"] == "2026-03-01"
    assert body["allocation"][0]["weights"] == pytest.approx([1 / 3] * 3)


def test_weights_may_name_the_arms_and_ramps_are_kept_in_order(client: Any) -> None:
    response = client.post("/v1/experiments", json={
        **EXPERIMENT, "allocation": [
            {"from": "2026-11-02", "weights": {"cards": 0.5, "control": 0.5}},
            {"from": "2026-10-26", "weights": {"control": 0.9, "cards": 0.1}}]})
    assert response.status_code == 201, response.text
    assert response.json()["allocation"] == [
        {"from": "2026-10-26", "weights": [0.9, 0.1]},
        {"from": "2026-11-02", "weights": [0.5, 0.5]}]


def test_show_and_list(client: Any, experiment: dict[str, Any]) -> None:
    shown = client.get("/v1/experiments/route-cards")
    assert shown.status_code == 200
    assert shown.json()["id"] == "route-cards"
    for index in range(3):
        client.post("/v1/experiments", json={**EXPERIMENT, "id": f"x-{index}"})
    first = client.get("/v1/experiments", params={"limit": 2}).json()
    assert [e["id"] for e in first["items"]] == ["route-cards", "x-0"]
    second = client.get("/v1/experiments", params={"limit": 2, "cursor": first["next"]}).json()
    assert [e["id"] for e in second["items"]] == ["x-1", "x-2"]
    assert second["next"] is None


def test_duplicate_id_is_a_conflict_and_changes_nothing(client: Any, experiment: Any,
                                                        counts: Any) -> None:
    before = counts()
    body = assert_problem(client.post("/v1/experiments", json={**EXPERIMENT, "title": "other"}),
                          409, "conflict")
    assert "route-cards" in body["detail"]
    assert counts() == before
    assert client.get("/v1/experiments/route-cards").json()["title"] == EXPERIMENT["title"]


@pytest.mark.parametrize(("change", "field"), [
    ({"id": "Route-Cards"}, "id"),
    ({"id": "-cards"}, "id"),
    ({"id": "a" * 65}, "id"),
    ({"arms": ["control"]}, "arms"),
    ({"arms": ["control", "control"]}, "arms"),
    ({"arms": ["control", " cards"]}, "arms[1]"),
    ({"start_date": "2026-02-30"}, "start_date"),
    ({"allocation": [{"from": "2026-10-26", "weights": [0.6, 0.6]}]}, "allocation[0].weights"),
    ({"allocation": [{"from": "2026-10-26", "weights": [1.0, 0.0]}]}, "allocation[0].weights"),
    ({"allocation": [{"from": "2026-10-26", "weights": [0.5, 0.3, 0.2]}]},
     "allocation[0].weights"),
    ({"allocation": [{"from": "2026-10-26", "weights": {"control": 0.5, "other": 0.5}}]},
     "allocation[0].weights"),
    ({"allocation": [{"from": "2026-10-26", "weights": [0.5, 0.5]},
                     {"from": "2026-10-26", "weights": [0.4, 0.6]}]}, "allocation"),
    ({"allocation": [{"from": "2026-11-01", "weights": [0.5, 0.5]}]}, "allocation[0].from"),
    ({"allocation": []}, "allocation"),
    ({"notify": {"webhook_url": "ftp://example.test/x"}}, "notify.webhook_url"),
    ({"colour": "blue"}, "colour"),
])
def test_invalid_experiments_are_refused_naming_the_field(client: Any, counts: Any,
                                                          change: dict[str, Any],
                                                          field: str) -> None:
    before = counts()
    body = assert_problem(client.post("/v1/experiments", json={**EXPERIMENT, **change}), 422,
                          "invalid-input")
    assert field in [e["field"] for e in body["errors"]], body["errors"]
    assert counts() == before


def test_malformed_json_is_a_400_problem(client: Any, counts: Any) -> None:
    before = counts()
    response = client.post("/v1/experiments", content=b'{"id": "x",',
                           headers={"Content-Type": "application/json"})
    assert_problem(response, 400, "malformed-body")
    assert counts() == before


def test_patch_title_notify_and_secret_handling(client: Any, experiment: Any) -> None:
    response = client.patch("/v1/experiments/route-cards", json={
        "title": "Cards, second look",
        "notify": {"webhook_url": "https://hooks.example.test/a", "secret": "first-secret"}})
    assert response.status_code == 200, response.text
    assert response.json()["title"] == "Cards, second look"
    assert response.json()["notify"]["has_secret"] is True
    # A notify without secret keeps the secret; notify: null removes everything.
    kept = client.patch("/v1/experiments/route-cards",
                        json={"notify": {"webhook_url": "https://hooks.example.test/b"}}).json()
    assert kept["notify"] == {"webhook_url": "https://hooks.example.test/b", "has_secret": True}
    cleared = client.patch("/v1/experiments/route-cards", json={"notify": None}).json()
    assert cleared["notify"] is None
    assert "first-secret" not in str(client.get("/v1/experiments/route-cards").json())


def test_patch_refuses_bad_values_and_writes_nothing(client: Any, experiment: Any,
                                                     counts: Any) -> None:
    before = counts()
    for change, field in (({"allocation": [{"from": "2026-10-26", "weights": [2, -1]}]},
                           "allocation[0].weights"),
                          ({"title": None}, "title"), ({"arms": ["a", "b"]}, "arms")):
        body = assert_problem(client.patch("/v1/experiments/route-cards", json=change), 422)
        assert field in [e["field"] for e in body["errors"]]
    assert counts() == before
    assert client.get("/v1/experiments/route-cards").json()["allocation"] == \
        EXPERIMENT["allocation"]


def test_unknown_experiment_is_404(client: Any, counts: Any) -> None:
    before = counts()
    assert_problem(client.get("/v1/experiments/nope"), 404, "not-found")
    assert_problem(client.patch("/v1/experiments/nope", json={"title": "x"}), 404)
    assert counts() == before
