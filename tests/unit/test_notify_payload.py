"""Notification payloads built from an alert and the diagnosis of the demo scenario."""

from __future__ import annotations

import datetime as dt
from typing import Any

from service.demo import scenario
from service.notify import payload as payloads
from tests.demo_documents import demo_documents

EXPERIMENT = {"id": "route-cards", "title": "Route cards on the trail list"}
CAMPAIGN_DATES = [(scenario.START + dt.timedelta(days=d)).isoformat()
                  for d in scenario.CAMPAIGN_DAYS]


def alert(kind: str, key: str, **extra: Any) -> dict[str, Any]:
    return {"id": 7, "kind": kind, "key": key, "status": "open", "severity": "alert",
            "title": f"{kind} {key}", "detail": {}, "opened_at": "2026-11-10T06:00:00+00:00",
            "resolved_at": None, "resolved_by": None, "resolution_reason": None, **extra}


def build(event_type: str, the_alert: dict[str, Any], document: dict[str, Any] | None,
          public_url: str | None = "https://inrush.larkspur.example/") -> dict[str, Any]:
    return payloads.build_payload(
        event_type=event_type, event_id=payloads.event_id(7, 31),
        occurred_at="2026-11-10T06:00:00+00:00", experiment=EXPERIMENT, alert=the_alert,
        document=document, diagnosis_version=4, public_url=public_url)


def test_overall_mismatch_names_the_campaign_days_arm_and_source() -> None:
    document = demo_documents().diagnosis
    body = build(payloads.OPENED, alert("srm", "overall"), document)
    data = body["data"]
    assert body["type"] == "alert.opened" and body["id"] == "inrush-alert-7-t31"
    assert data["experiment"] == EXPERIMENT
    # The scenario's campaign: two days, about 900 extra units a day into cards, of which
    # half is the planned share of the bigger day -> ~450 excess units a day (simulation).
    assert data["days"] == CAMPAIGN_DATES
    assert data["inflow_arm"] == "cards"
    assert abs(data["excess"]["cards"] - 900) < 120
    assert data["sources"][0]["source"] == "newsletter"
    assert data["sources"][0]["share_of_excess"] > 0.8
    assert abs(sum(s["share_of_excess"] for s in data["sources"]) - 1) < 1e-3
    # The excess is the sum of the document's per-day excess.
    expected = sum(d["excess"]["cards"] for d in document["flagged_days"]
                   if d["severity"] == "alert")
    assert abs(data["excess"]["cards"] - expected) < 0.2
    assert data["advice"] == document["advice"] and data["advice"]
    assert data["diagnosis"]["srm_p_value"] == document["srm"]["p_value"]
    assert data["diagnosis"]["version"] == 4
    assert data["cautions"] and "not a randomised estimate" in data["cautions"][0]
    assert "newsletter" in data["flagged"] and "cards" in data["flagged"]


def test_links_point_back_to_the_api_and_status_page() -> None:
    document = demo_documents().diagnosis
    links = build(payloads.OPENED, alert("srm", "overall"), document)["data"]["links"]
    assert links == {
        "diagnosis": "https://inrush.larkspur.example/v1/experiments/route-cards/diagnosis",
        "alert": "https://inrush.larkspur.example/v1/alerts/7",
        "status_page": "https://inrush.larkspur.example/experiments/route-cards"}
    relative = build(payloads.OPENED, alert("srm", "overall"), None, public_url=None)
    assert relative["data"]["links"]["alert"] == "/v1/alerts/7"


def test_skewed_day_and_source_pick_their_days() -> None:
    document = demo_documents().diagnosis
    day = build(payloads.OPENED, alert("skewed_day", CAMPAIGN_DATES[1]), document)["data"]
    assert day["days"] == [CAMPAIGN_DATES[1]]
    one_day = next(d for d in document["flagged_days"] if d["date"] == CAMPAIGN_DATES[1])
    assert day["excess"]["cards"] == round(one_day["excess"]["cards"], 1)
    source = build(payloads.OPENED, alert("skewed_source", "newsletter"), document)["data"]
    assert source["days"] == CAMPAIGN_DATES
    unrelated = build(payloads.OPENED, alert("skewed_source", "carrier_pigeon"),
                      document)["data"]
    assert unrelated["days"] == [] and unrelated["sources"] == []


def test_resolved_event_says_why_and_carries_no_shift_caution() -> None:
    resolved = alert("skewed_day", "2026-11-09", status="resolved",
                     resolved_at="2026-11-12T09:00:00+00:00", resolved_by="inrush",
                     resolution_reason="corrected data no longer supports it")
    body = build(payloads.RESOLVED, resolved, None)
    assert body["type"] == "alert.resolved"
    assert body["data"]["alert"]["resolution_reason"].startswith("corrected data")
    assert body["data"]["flagged"].startswith("Resolved:")
    assert body["data"]["cautions"] == [] and body["data"]["diagnosis"] is None


def test_event_ids_are_stable_and_distinct_per_transition() -> None:
    assert payloads.event_id(7, 31) == payloads.event_id(7, 31)
    assert payloads.event_id(7, 31) != payloads.event_id(7, 32)
    assert payloads.event_id(7, 31) != payloads.event_id(8, 31)
