"""Incidents through the HTTP API on SQLite and PostgreSQL: listing with filters and pages, one
incident, the lifecycle steps and their scopes, and the diagnosis document that carries the
incidents under a tag that follows their lifecycle (route and poll fast path alike)."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest
from apihelpers import EXPERIMENT, assert_problem, corrected_demo_csv, demo_csv_text, upload_csv

BASE = "/v1/experiments/route-cards"



@pytest.fixture
def demo(client: Any) -> dict[str, Any]:
    """The demo experiment, uploaded; its one incident as listed."""
    assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
    upload_csv(client, demo_csv_text())
    [incident] = client.get(f"{BASE}/incidents").json()["items"]
    return incident


def test_the_campaign_is_one_incident_with_its_evidence(client: Any,
                                                        demo: dict[str, Any]) -> None:
    assert (demo["shape"], demo["arm"], demo["status"]) == ("inflow", "cards", "open")
    days = [d["date"] for d in demo["daily"]]
    assert days[0] == demo["start"] and days[-1] == demo["end"]
    assert demo["units"] == pytest.approx(sum(d["units"] for d in demo["daily"]), abs=0.2)
    assert demo["sources"][0]["source"] == "newsletter"
    kinds = {e["kind"] for e in demo["evidence"]}
    assert {"skewed_window", "skewed_source"} <= kinds
    # Every finding behind it is stored and readable as an alert.
    for evidence in demo["evidence"]:
        assert evidence["alert"] is not None
        alert = client.get(f"/v1/alerts/{evidence['alert']}").json()
        assert (alert["kind"], alert["key"]) == (evidence["kind"], evidence["key"])
    detail = client.get(demo["url"]).json()
    assert [e["action"] for e in detail["events"]] == ["opened"]
    assert detail["id"] == demo["id"] and detail["active"] is True
    # Re-sending the same export changes nothing.
    upload_csv(client, demo_csv_text())
    again = client.get(demo["url"]).json()
    assert again["events"] == detail["events"]
    assert len(client.get("/v1/incidents").json()["items"]) == 1


def test_corrected_data_resolves_the_incident(client: Any, demo: dict[str, Any]) -> None:
    upload_csv(client, corrected_demo_csv())
    incident = client.get(demo["url"]).json()
    assert incident["status"] == "resolved" and incident["active"] is False
    assert incident["resolved_by"] == "inrush"
    assert incident["resolution"].startswith("corrected data no longer supports it: ")
    assert [e["action"] for e in incident["events"]] == ["opened", "resolved"]


def test_filters_and_pages(client: Any, demo: dict[str, Any]) -> None:
    second = {**EXPERIMENT, "id": "route-cards-2"}
    assert client.post("/v1/experiments", json=second).status_code == 201
    upload_csv(client, demo_csv_text(), "route-cards-2")
    listed = client.get("/v1/incidents").json()["items"]
    assert [i["experiment"] for i in listed] == ["route-cards-2", "route-cards"]
    one = client.get("/v1/incidents", params={"experiment": "route-cards"}).json()["items"]
    assert [i["id"] for i in one] == [demo["id"]]
    assert client.get("/v1/incidents", params={"shape": "shortfall"}).json()["items"] == []
    assert len(client.get("/v1/incidents", params=[("shape", "inflow"), ("shape", "shortfall")])
               .json()["items"]) == 2
    assert client.get("/v1/incidents", params={"status": "resolved"}).json()["items"] == []
    assert client.get("/v1/incidents", params={"since": "2999-01-01"}).json()["items"] == []
    assert len(client.get("/v1/incidents", params={"since": "2020-01-01"})
               .json()["items"]) == 2
    first = client.get("/v1/incidents", params={"limit": 1}).json()
    assert len(first["items"]) == 1 and first["next"] is not None
    rest = client.get(first["next_url"]).json()
    assert [i["id"] for i in rest["items"]] == [demo["id"]] and rest["next"] is None
    body = assert_problem(client.get("/v1/incidents", params={"since": "last week"}), 422)
    assert body["errors"][0]["field"] == "since"
    assert_problem(client.get("/v1/incidents", params={"shape": "trickle"}), 422)
    assert_problem(client.get("/v1/incidents", params={"status": "closed"}), 422)
    assert_problem(client.get("/v1/incidents", params={"cursor": "x1"}), 422)
    assert_problem(client.get("/v1/experiments/nowhere/incidents"), 404)
    assert_problem(client.get("/v1/incidents/999999"), 404)
    assert_problem(client.get(f"/v1/incidents/{2**63}"), 404)


def test_lifecycle_and_scopes(anonymous: Any, demo: dict[str, Any],
                              token_for: Callable[..., str]) -> None:
    reader = {"Authorization": f"Bearer {token_for('read')}"}
    writer = {"Authorization": f"Bearer {token_for('write', 'trail-lead')}"}
    del anonymous.headers["Authorization"]  # the admin token the demo was uploaded with
    path = f"/v1/incidents/{demo['id']}"
    assert_problem(anonymous.get("/v1/incidents"), 401)
    assert_problem(anonymous.get(f"{BASE}/incidents"), 401)
    assert_problem(anonymous.get(path), 401)
    assert anonymous.get(path, headers=reader).status_code == 200
    assert_problem(anonymous.post(f"{path}/acknowledge"), 401)
    assert_problem(anonymous.post(f"{path}/acknowledge", headers=reader), 403)
    assert_problem(anonymous.post(f"{path}/resolve", headers=reader), 403)
    assert_problem(anonymous.post(f"{path}/acknowledge", headers=writer,
                                  json={"note": "x", "extra": 1}), 422)
    acknowledged = anonymous.post(f"{path}/acknowledge", headers=writer,
                                  json={"note": "asking the newsletter team"})
    assert acknowledged.status_code == 200, acknowledged.text
    body = acknowledged.json()
    assert body["status"] == "acknowledged" and body["acknowledged_by"] == "trail-lead"
    assert body["events"][-1]["note"] == "asking the newsletter team"
    conflict = assert_problem(anonymous.post(f"{path}/acknowledge", headers=writer), 409)
    assert conflict["current_status"] == "acknowledged"
    resolved = anonymous.post(f"{path}/resolve", headers=writer).json()
    assert resolved["status"] == "resolved" and resolved["resolution"] == "resolved by trail-lead"
    assert_problem(anonymous.post(f"{path}/resolve", headers=writer), 409)
    assert_problem(anonymous.post("/v1/incidents/999999/resolve", headers=writer), 404)
    # While the data still shows the episode, it stays this one resolved incident.
    anonymous.headers.update(writer)
    upload_csv(anonymous, demo_csv_text())
    assert [i["status"] for i in anonymous.get("/v1/incidents").json()["items"]] == [
        "resolved"]


def test_the_diagnosis_carries_the_incidents_and_its_tag_follows_them(
        client: Any, demo: dict[str, Any]) -> None:
    served = client.get(f"{BASE}/diagnosis")
    tag = served.headers["etag"]
    [incident] = served.json()["incidents"]
    assert incident["id"] == demo["id"] and incident["experiment"] == "route-cards"
    assert incident["status"] == "open" and incident["resolved_at"] is None
    assert incident["opened_at"] and incident["resolution"] is None
    assert incident["start"] == demo["start"] and incident["units"] == demo["units"]
    assert client.get(f"{BASE}/diagnosis", headers={"If-None-Match": tag}).status_code == 304
    version = served.headers["x-inrush-diagnosis-version"]

    client.post(f"/v1/incidents/{demo['id']}/acknowledge")
    # The old tag no longer answers 304: the poll fast path (service.revalidation) answers
    # from the stored served tag before routing, so a stale one would show here.
    fresh = client.get(f"{BASE}/diagnosis", headers={"If-None-Match": tag})
    assert fresh.status_code == 200
    assert fresh.headers["x-inrush-diagnosis-version"] == version  # same diagnosis
    assert fresh.json()["incidents"][0]["status"] == "acknowledged"
    new_tag = fresh.headers["etag"]
    assert new_tag != tag
    assert client.get(f"{BASE}/diagnosis", headers={"If-None-Match": new_tag}).status_code == 304
    assert client.get(f"{BASE}/diagnoses").json()["items"][0]["etag"] == new_tag
    by_version = client.get(f"{BASE}/diagnosis", params={"version": version})
    assert by_version.headers["etag"] == new_tag and by_version.json() == fresh.json()

    # Corrected data: a new diagnosis without the episode; the earlier one is served as it was
    # computed, under its own tag.
    upload_csv(client, corrected_demo_csv())
    latest = client.get(f"{BASE}/diagnosis").json()
    assert latest["incidents"] == []
    earlier = client.get(f"{BASE}/diagnosis", params={"version": version})
    assert earlier.headers["etag"] not in (tag, new_tag)
    assert "status" not in earlier.json()["incidents"][0]
