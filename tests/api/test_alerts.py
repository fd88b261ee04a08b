"""Alerts: derived from findings, deduplicated, auto-resolved, lifecycle, filters, paging."""

from __future__ import annotations

import datetime as dt
from typing import Any

import pandas as pd
import pytest
from apihelpers import DEMO_CSV, assert_problem, corrected_demo_csv, demo_csv_text, upload_csv

from detectors import AllocationSchedule, ObservationTable, diagnose
from service.csvio import read_observations_csv
from service.demo import scenario


def alerts(client: Any, **params: Any) -> list[dict[str, Any]]:
    response = client.get("/v1/alerts", params={"limit": 500, **params})
    assert response.status_code == 200, response.text
    return response.json()["items"]


def expected_findings() -> set[tuple[str, str]]:
    """(kind, key) of the findings the detectors report on the demo file."""
    table = ObservationTable.from_frame(read_observations_csv(DEMO_CSV), scenario.ARMS)
    schedule = AllocationSchedule.constant(scenario.ARMS, [0.5, 0.5], scenario.START)
    return {(f.kind, f.key) for f in diagnose(table, schedule).findings()}


def campaign_window() -> str:
    """The key of the skewed-window finding over the campaign's days."""
    days = sorted(scenario.START + dt.timedelta(days=d) for d in scenario.CAMPAIGN_DAYS)
    return f"{days[0].isoformat()}..{days[-1].isoformat()}"


def test_findings_open_one_alert_each(client: Any, experiment: Any) -> None:
    answer = upload_csv(client, demo_csv_text())
    found = alerts(client)
    assert {(a["kind"], a["key"]) for a in found} == expected_findings()
    assert answer["alerts"] == {"opened": len(found), "resolved": 0}
    # The findings are the evidence of one incident, which alone is news.
    assert answer["incidents"] == {"opened": 1, "updated": 0, "resolved": 0}
    assert {a["key"] for a in found if a["kind"] == "skewed_window"} == {campaign_window()}
    assert ("skewed_source", "newsletter") in {(a["kind"], a["key"]) for a in found}
    assert all(a["status"] == "open" and a["active"] for a in found)


def test_resending_or_daily_uploads_never_repeat_an_alert(client: Any, experiment: Any,
                                                          counts: Any) -> None:
    frame = pd.read_csv(DEMO_CSV)
    for _, day in frame.groupby("date", sort=True):  # as a nightly export would
        upload_csv(client, day.to_csv(index=False))
    first = alerts(client)
    keys = [(a["kind"], a["key"]) for a in first]
    assert len(keys) == len(set(keys))
    # Only new days arrived, so an alert the service resolved on the way says so.
    for alert in first:
        if alert["resolved_by"] == "inrush":
            assert alert["resolution_reason"].startswith("later data no longer supports it: ")
    state = counts()
    again = upload_csv(client, demo_csv_text())
    assert again["alerts"] == {"opened": 0, "resolved": 0}
    assert counts() == state

    def unchanged(items: list[dict[str, Any]]) -> list[dict[str, Any]]:
        return [{k: v for k, v in a.items() if k != "last_seen_at"} for a in items]

    assert unchanged(alerts(client)) == unchanged(first)


def test_corrected_data_resolves_alerts_and_says_why(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    opened = {a["id"]: a for a in alerts(client)}
    answer = upload_csv(client, corrected_demo_csv())
    assert answer["alerts"]["resolved"] >= 1
    for alert in alerts(client):
        if alert["kind"] == "skewed_window":
            assert alert["status"] == "resolved"
            assert alert["resolved_by"] == "inrush"
            assert alert["resolution_reason"].startswith(
                "corrected data no longer supports it: ")
            assert alert["key"] in alert["resolution_reason"]
            assert not alert["active"]
    detail = client.get(f"/v1/alerts/{next(iter(opened))}").json()
    assert detail["events"][0]["action"] == "opened"


def test_a_finding_that_returns_reopens_the_same_alert(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    before = {(a["kind"], a["key"]): a["id"] for a in alerts(client)}
    upload_csv(client, corrected_demo_csv())
    answer = upload_csv(client, demo_csv_text())
    assert answer["alerts"]["opened"] >= 1
    now = {(a["kind"], a["key"]): a for a in alerts(client)}
    assert {k: a["id"] for k, a in now.items()} == before
    day = now[("skewed_window", campaign_window())]
    assert day["status"] == "open" and day["resolved_by"] is None
    actions = [e["action"] for e in client.get(f"/v1/alerts/{day['id']}").json()["events"]]
    assert actions == ["opened", "resolved", "reopened"]


def test_lifecycle_records_who_and_when(anonymous: Any, client: Any, experiment: Any,
                                        token_for: Any, counts: Any) -> None:
    upload_csv(client, demo_csv_text())
    alert = alerts(client, kind="skewed_window")[0]
    analyst = {"Authorization": f"Bearer {token_for('write', 'analyst-ana')}"}
    url = f"/v1/alerts/{alert['id']}"
    acked = anonymous.post(url + "/acknowledge", headers=analyst, json={"note": "looking"})
    assert acked.status_code == 200, acked.text
    assert acked.json()["status"] == "acknowledged"
    assert acked.json()["acknowledged_by"] == "analyst-ana"
    assert acked.json()["acknowledged_at"] is not None
    state = counts()
    body = assert_problem(anonymous.post(url + "/acknowledge", headers=analyst), 409, "conflict")
    assert body["current_status"] == "acknowledged"
    assert counts() == state
    resolved = anonymous.post(url + "/resolve", headers=analyst,
                              json={"note": "newsletter confirmed; re-weighted"})
    assert resolved.json()["status"] == "resolved"
    assert resolved.json()["resolved_by"] == "analyst-ana"
    assert resolved.json()["resolution_reason"] == "newsletter confirmed; re-weighted"
    state = counts()
    assert_problem(anonymous.post(url + "/resolve", headers=analyst), 409)
    assert_problem(anonymous.post(url + "/acknowledge", headers=analyst), 409)
    assert counts() == state
    events = client.get(url).json()["events"]
    assert [(e["action"], e["actor"], e["note"]) for e in events] == [
        ("opened", "inrush", None), ("acknowledged", "analyst-ana", "looking"),
        ("resolved", "analyst-ana", "newsletter confirmed; re-weighted")]
    # A person's resolution stands while the data still supports the finding.
    upload_csv(client, demo_csv_text())
    assert client.get(url).json()["status"] == "resolved"


def test_open_alert_can_be_resolved_directly_and_body_is_optional(client: Any,
                                                                  experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    alert = alerts(client)[0]
    response = client.post(f"/v1/alerts/{alert['id']}/resolve")
    assert response.status_code == 200, response.text
    assert response.json()["resolved_by"] == "bootstrap-admin"


def test_acknowledged_alerts_are_also_auto_resolved(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    day = alerts(client, kind="skewed_window")[0]
    client.post(f"/v1/alerts/{day['id']}/acknowledge")
    upload_csv(client, corrected_demo_csv())
    after = client.get(f"/v1/alerts/{day['id']}").json()
    assert after["status"] == "resolved" and after["resolved_by"] == "inrush"
    assert after["events"][-1]["from_status"] == "acknowledged"


def test_lifecycle_refusals(client: Any, experiment: Any, counts: Any) -> None:
    upload_csv(client, demo_csv_text())
    alert_id = alerts(client)[0]["id"]
    state = counts()
    assert_problem(client.post("/v1/alerts/999999/acknowledge"), 404)
    assert_problem(client.get("/v1/alerts/999999"), 404)
    assert_problem(client.post(f"/v1/alerts/{alert_id}/acknowledge", json={"note": 5}), 422)
    assert_problem(client.post(f"/v1/alerts/{alert_id}/acknowledge", json={"colour": "x"}), 422)
    assert_problem(client.post(f"/v1/alerts/{alert_id}/resolve", content=b"{oops",
                               headers={"Content-Type": "application/json"}), 400)
    assert_problem(client.post(f"/v1/alerts/{alert_id}/resolve", json={"note": "x" * 2001}),
                   422)
    assert_problem(client.post("/v1/alerts/abc/resolve"), 422)
    assert counts() == state


def test_filters(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    client.post("/v1/experiments", json={"id": "other", "start_date": "2026-10-26",
                                         "arms": ["control", "cards"]})
    upload_csv(client, demo_csv_text(), "other")
    everything = alerts(client)
    assert {a["experiment"] for a in everything} == {"route-cards", "other"}
    mine = alerts(client, experiment="route-cards")
    assert mine and {a["experiment"] for a in mine} == {"route-cards"}
    first = mine[0]
    client.post(f"/v1/alerts/{first['id']}/acknowledge")
    assert [a["id"] for a in alerts(client, status="acknowledged")] == [first["id"]]
    assert len(alerts(client, status=["open", "acknowledged"])) == len(everything)
    days = alerts(client, kind="skewed_window")
    assert days and {a["kind"] for a in days} == {"skewed_window"}
    assert alerts(client, since="2999-01-01") == []
    assert len(alerts(client, since="2000-01-01")) == len(everything)
    assert len(alerts(client, since="2000-01-01T00:00:00+02:00")) == len(everything)
    for bad in ({"status": "closed"}, {"kind": "weather"}, {"since": "yesterday"},
                {"limit": 0}, {"limit": 501}, {"cursor": "zz"}):
        assert_problem(client.get("/v1/alerts", params=bad), 422)


def test_pagination_walks_every_alert_once(client: Any, experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    everything = [a["id"] for a in alerts(client)]
    assert len(everything) >= 3
    seen: list[int] = []
    params: dict[str, Any] = {"limit": 1}
    while True:
        page = client.get("/v1/alerts", params=params).json()
        seen += [a["id"] for a in page["items"]]
        if page["next"] is None:
            break
        assert page["next_url"].endswith(f"cursor={page['next']}")
        params = {"limit": 1, "cursor": page["next"]}
    assert seen == everything == sorted(everything, reverse=True)


@pytest.mark.parametrize("scope", ["read"])
def test_read_scope_lists_but_cannot_transition(anonymous: Any, client: Any, experiment: Any,
                                                token_for: Any, scope: str) -> None:
    upload_csv(client, demo_csv_text())
    headers = {"Authorization": f"Bearer {token_for(scope)}"}
    listed = anonymous.get("/v1/alerts", headers=headers)
    assert listed.status_code == 200 and listed.json()["items"]
    alert_id = listed.json()["items"][0]["id"]
    assert_problem(anonymous.post(f"/v1/alerts/{alert_id}/resolve", headers=headers), 403)
    assert client.get(f"/v1/alerts/{alert_id}").json()["status"] == "open"
