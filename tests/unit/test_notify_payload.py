"""Notification payloads built from an incident of the demo scenario: the incident first."""

from __future__ import annotations

import datetime as dt
import functools
from typing import Any

import pandas as pd
import pytest

from detectors import AllocationSchedule, ObservationTable, diagnose
from service.demo import scenario
from service.http import json_safe
from service.incidents import explanation
from service.notify import payload as payloads
from tests.demo_documents import demo_documents

EXPERIMENT = {"id": "route-cards", "title": "Route cards on the trail list"}
CAMPAIGN_DATES = [(scenario.START + dt.timedelta(days=d)).isoformat()
                  for d in scenario.CAMPAIGN_DAYS]


@functools.cache
def demo_episode() -> dict[str, Any]:
    frame = pd.read_csv(scenario.CSV_PATH)
    table = ObservationTable.from_frame(frame, list(scenario.ARMS))
    diagnosis = diagnose(table, AllocationSchedule.constant(list(scenario.ARMS)),
                         experiment=scenario.EXPERIMENT_ID)
    [episode] = diagnosis.episodes
    return json_safe(episode.to_dict())


def incident(**extra: Any) -> dict[str, Any]:
    episode = {**demo_episode(), "campaigns": ["autumn-trails"]}
    return {**episode, "id": 7, "experiment": "route-cards", "status": "open",
            "opened_at": "2026-11-10T06:00:00+00:00", "acknowledged_at": None,
            "resolved_at": None, "resolution": None, "explained_by": explanation(episode),
            **extra}


def build(event_type: str, the_incident: dict[str, Any], *,
          changes: dict[str, Any] | None = None, document: dict[str, Any] | None = None,
          public_url: str | None = "https://inrush.larkspur.example/") -> dict[str, Any]:
    return payloads.build_payload(
        event_type=event_type, event_id=payloads.event_id(7, 31),
        occurred_at="2026-11-10T06:00:00+00:00", experiment=EXPERIMENT,
        incident=the_incident, changes=changes, document=document, diagnosis_version=4,
        public_url=public_url)


def test_the_payload_leads_with_the_incident_then_the_detail() -> None:
    body = build(payloads.OPENED, incident(), document=demo_documents().diagnosis)
    assert body["type"] == "incident.opened" and body["id"] == "inrush-incident-7-t31"
    data = body["data"]
    assert list(data)[:2] == ["headline", "incident"]
    lead = data["incident"]
    assert list(lead)[:14] == ["id", "experiment", "status", "shape", "arm", "start", "end",
                               "days", "units", "units_meaning", "sources", "campaigns",
                               "explained_by", "advice"]
    # The demo's campaign: two days of extra newsletter units into cards.
    assert (lead["shape"], lead["arm"], lead["days"]) == ("inflow", "cards", CAMPAIGN_DATES)
    assert lead["sources"][0]["source"] == "newsletter"
    assert lead["campaigns"] == ["autumn-trails"]
    assert lead["explained_by"].startswith("Explained by the registered campaign")
    assert lead["advice"]
    # One figure: the units are the incident's, the sum of its days.
    assert lead["units"] == pytest.approx(sum(d["units"] for d in data["detail"]["daily"]),
                                          abs=0.2)
    assert {e["kind"] for e in data["detail"]["evidence"]} >= {"skewed_window", "skewed_source"}
    assert f"{lead['units']:.0f} units over plan" in data["headline"]
    assert "via newsletter" in data["headline"] and "autumn-trails" in data["headline"]
    assert data["changes"] is None
    assert data["diagnosis"]["version"] == 4 and data["diagnosis"]["status"]
    assert data["cautions"] and "not a randomised estimate" in data["cautions"][0]


def test_a_shortfall_is_told_as_units_under_plan() -> None:
    short = incident(shape="shortfall", units=-640.0, campaigns=[])
    headline = build(payloads.OPENED, short)["data"]["headline"]
    assert headline.startswith("Shortfall in cards") and "640 units under plan" in headline


def test_an_update_names_what_changed() -> None:
    changes = {"end": [CAMPAIGN_DATES[0], CAMPAIGN_DATES[1]]}
    data = build(payloads.UPDATED, incident(), changes=changes)["data"]
    assert data["changes"] == changes and data["headline"].startswith("Updated (end): ")


def test_links_point_back_to_the_api_and_status_page() -> None:
    links = build(payloads.OPENED, incident())["data"]["links"]
    assert links == {
        "diagnosis": "https://inrush.larkspur.example/v1/experiments/route-cards/diagnosis",
        "incident": "https://inrush.larkspur.example/v1/incidents/7",
        "status_page": "https://inrush.larkspur.example/experiments/route-cards"}
    relative = build(payloads.OPENED, incident(), public_url=None)
    assert relative["data"]["links"]["incident"] == "/v1/incidents/7"


def test_resolved_event_says_why_and_carries_no_shift_caution() -> None:
    reason = "corrected data no longer supports it: cards follows the plan"
    body = build(payloads.RESOLVED, incident(status="resolved", resolution=reason,
                                             resolved_at="2026-11-12T09:00:00+00:00"))
    assert body["type"] == "incident.resolved"
    assert body["data"]["incident"]["resolution"] == reason
    assert body["data"]["headline"].startswith("Resolved:") and reason in body["data"][
        "headline"]
    assert body["data"]["cautions"] == [] and body["data"]["diagnosis"] is None


def test_event_ids_are_stable_and_distinct_per_transition() -> None:
    assert payloads.event_id(7, 31) == payloads.event_id(7, 31)
    assert payloads.event_id(7, 31) != payloads.event_id(7, 32)
    assert payloads.event_id(7, 31) != payloads.event_id(8, 31)
    with pytest.raises(ValueError, match="unknown event type"):
        build("alert.opened", incident())
