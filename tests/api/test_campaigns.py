"""/v1/experiments/{id}/campaigns: pre-flight checks of outreach campaigns, and the diagnosis
naming a registered campaign on its flagged days.

The expected excesses below are worked by hand from the allocation: a campaign reaching share
``s_a`` of arm ``a``'s units brings arrivals in the proportions ``s_a w_a / sum_b s_b w_b``
while the Pearson goodness-of-fit test expects ``w_a`` (Pearson 1900); excess = arrivals x
(landing share - planned weight). Common practice, no source.
"""

from __future__ import annotations

import datetime as dt
import html
from typing import Any

import pytest
from apihelpers import EXPERIMENT, assert_problem, demo_csv_text, upload_csv

from service.demo import scenario

URL = "/v1/experiments/route-cards/campaigns"
NEWSLETTER_DAYS = [(scenario.START + dt.timedelta(days=d)).isoformat()
                   for d in scenario.CAMPAIGN_DAYS]


def register(client: Any, url: str = URL, **fields: Any) -> dict[str, Any]:
    body = {"name": "autumn-routes", "source": "newsletter", "start": "2026-11-09",
            "end": "2026-11-10", "audience": {"cards": 1.0}, **fields}
    response = client.post(url, json=body)
    assert response.status_code == 201, response.text
    return response.json()


def balanced_rows(first: dt.date, days: int, per_arm: dict[str, int]) -> list[dict[str, Any]]:
    return [{"date": (first + dt.timedelta(days=d)).isoformat(), "arm": arm,
             "source": "organic", "entered": units}
            for d in range(days) for arm, units in per_arm.items()]


def test_a_balanced_campaign_gets_no_warnings(client: Any, experiment: Any) -> None:
    answer = register(client, audience={"control": 0.2, "cards": 0.2}, expected_size=1800)
    check = answer["check"]
    assert check["balanced"] is True
    assert check["warnings"] == []
    assert check["fix"] is None
    assert check["size_basis"] == "expected_size"
    assert check["size_per_day"] == pytest.approx(900.0)
    for per_arm in check["expected_excess"].values():
        assert per_arm == {"control": pytest.approx(0.0), "cards": pytest.approx(0.0)}
    assert answer["audience"] == {"control": 0.2, "cards": 0.2}


def test_a_treatment_only_campaign_warns_with_the_excess_and_the_fix(
        client: Any, experiment: Any) -> None:
    answer = register(client, expected_size=2000)
    check = answer["check"]
    assert check["balanced"] is False
    # 1,000 arrivals a day, all in cards, planned 50/50: cards +500, control -500 a day.
    assert check["expected_excess"] == {day: {"control": -500.0, "cards": 500.0}
                                        for day in ("2026-11-09", "2026-11-10")}
    assert check["total_excess"] == {"control": -1000.0, "cards": 1000.0}
    text = " ".join(check["warnings"])
    assert "100% of cards' units and 0% of control's units" in text
    assert "cards +1,000" in text and "control -1,000" in text
    assert "same share of every arm" in check["fix"]
    assert "intent to treat" in check["fix"]
    assert check["warnings"][-1] == f"Fix: {check['fix']}."
    assert answer["audience"] == {"control": 0.0, "cards": 1.0}


def test_without_a_size_the_estimate_comes_from_traffic_before_the_campaign(
        client: Any, experiment: Any) -> None:
    start = scenario.START
    rows = balanced_rows(start, 14, {"control": 1000, "cards": 1000})
    # The campaign's own days already hold its inflow; they must not inflate the estimate.
    rows += balanced_rows(start + dt.timedelta(days=14), 2, {"control": 1000, "cards": 4000})
    assert client.put("/v1/experiments/route-cards/observations",
                      json={"rows": rows}).status_code == 200
    campaign_start = (start + dt.timedelta(days=14)).isoformat()
    check = register(client, start=campaign_start, end=campaign_start,
                     audience={"cards": 0.3})["check"]
    # 30% of cards' 1,000 units a day: 300 arrivals, all in cards: +150 over a 50/50 plan.
    assert check["size_basis"] == "recent_traffic"
    assert check["size_per_day"] == pytest.approx(300.0)
    assert check["expected_excess"][campaign_start] == {"control": -150.0, "cards": 150.0}
    assert any("rough guess" in w for w in check["warnings"])


def test_without_size_or_traffic_the_excess_is_per_thousand_arrivals(
        client: Any, experiment: Any) -> None:
    check = register(client, audience={"cards": 1.0})["check"]
    assert check["size_basis"] == "unknown"
    assert check["excess_unit"] == "per_1000_arrivals"
    assert check["expected_excess"]["2026-11-09"] == {"control": -500.0, "cards": 500.0}


def test_a_ramped_allocation_uses_the_weights_of_each_day(client: Any) -> None:
    ramp = {**EXPERIMENT, "id": "ramped-cards",
            "allocation": [{"from": "2026-10-26", "weights": [0.9, 0.1]},
                           {"from": "2026-11-02", "weights": [0.5, 0.5]}]}
    assert client.post("/v1/experiments", json=ramp).status_code == 201
    url = "/v1/experiments/ramped-cards/campaigns"
    check = register(client, url, start="2026-11-01", end="2026-11-02",
                     expected_size=2000)["check"]
    # 1,000 arrivals a day into cards: at 90/10 cards gets +900 over plan, at 50/50 +500.
    assert check["expected_excess"] == {"2026-11-01": {"control": -900.0, "cards": 900.0},
                                        "2026-11-02": {"control": -500.0, "cards": 500.0}}
    # Unequal reach at 90/10: cards' landing share 0.3*0.1 / (0.1*0.9 + 0.3*0.1) = 0.25.
    uneven = register(client, url, name="uneven", start="2026-11-01", end="2026-11-01",
                      audience={"control": 0.1, "cards": 0.3}, expected_size=1000)["check"]
    assert uneven["arrival_shares"]["2026-11-01"]["cards"] == pytest.approx(0.25)
    assert uneven["expected_excess"]["2026-11-01"]["cards"] == pytest.approx(150.0)
    # The same share of both arms follows the ramp exactly: no excess on either side of it.
    even = register(client, url, name="even", start="2026-11-01", end="2026-11-02",
                    audience={"control": 0.4, "cards": 0.4}, expected_size=2000)["check"]
    assert even["balanced"] and even["warnings"] == []
    assert even["arrival_shares"] == {"2026-11-01": {"control": 0.9, "cards": 0.1},
                                      "2026-11-02": {"control": 0.5, "cards": 0.5}}


def test_three_arms(client: Any) -> None:
    three = {**EXPERIMENT, "id": "route-views", "arms": ["control", "cards", "map"],
             "allocation": [{"from": "2026-10-26", "weights": [0.5, 0.25, 0.25]}]}
    assert client.post("/v1/experiments", json=three).status_code == 201
    url = "/v1/experiments/route-views/campaigns"
    check = register(client, url, start="2026-11-09", end="2026-11-09",
                     audience={"cards": 1.0, "map": 1.0}, expected_size=1000)["check"]
    # Both treatment arms reached, control not: each lands 0.25/0.5 = half the arrivals.
    assert check["expected_excess"]["2026-11-09"] == {"control": -500.0, "cards": 250.0,
                                                      "map": 250.0}
    assert "reach 100% of every arm's units" in check["fix"]
    balanced = register(client, url, name="all-arms", start="2026-11-09", end="2026-11-09",
                        audience={"control": 0.5, "cards": 0.5, "map": 0.5})["check"]
    assert balanced["warnings"] == []


def test_a_duplicate_name_is_409_and_writes_nothing(client: Any, experiment: Any,
                                                    counts: Any) -> None:
    register(client)
    before = counts()
    response = client.post(URL, json={"name": "  autumn-routes ", "source": "push",
                                      "start": "2026-11-12", "end": "2026-11-12",
                                      "audience": {"control": 0.5, "cards": 0.5}})
    body = assert_problem(response, 409, "conflict")
    assert "autumn-routes" in body["detail"]
    assert counts() == before


VALID = {"name": "autumn-routes", "source": "newsletter", "start": "2026-11-09",
         "end": "2026-11-10", "audience": {"cards": 1.0}}


@pytest.mark.parametrize(("change", "fields"), [
    ({"audience": {"cards": 1.0, "treatment": 0.5}}, {"audience.treatment"}),
    ({"end": "2026-11-01"}, {"end"}),
    ({"end": "2026-11-01", "audience": {"treatment": 1.0}}, {"end", "audience.treatment"}),
    ({"end": "2026-10-20", "start": "2026-10-19"}, {"end"}),  # before the experiment starts
    ({"end": "2028-01-01"}, {"end"}),  # longer than a year
    ({"audience": {"cards": 1.5}}, {"audience.cards"}),
    ({"audience": {"cards": True}}, {"audience.cards"}),
    ({"audience": {"control": 0, "cards": 0}}, {"audience"}),
    ({"audience": {}}, {"audience"}),
    ({"start": "2026-11-31"}, {"start"}),
    ({"start": 1794700800}, {"start"}),
    ({"start": "2026-11-09T08:00:00"}, {"start"}),
    ({"name": "   "}, {"name"}),
    ({"source": ""}, {"source"}),
    ({"expected_size": 0}, {"expected_size"}),
    ({"expected_size": 12.5}, {"expected_size"}),
    ({"colour": "red"}, {"colour"}),
])
def test_invalid_campaigns_are_422_naming_the_fields_and_write_nothing(
        client: Any, experiment: Any, counts: Any, change: dict[str, Any],
        fields: set[str]) -> None:
    upload_csv(client, demo_csv_text())
    before = counts()
    body = assert_problem(client.post(URL, json={**VALID, **change}), 422, "invalid-input")
    assert {e["field"] for e in body["errors"]} == fields
    assert counts() == before


def test_missing_fields_are_named(client: Any, experiment: Any, counts: Any) -> None:
    before = counts()
    body = assert_problem(client.post(URL, json={"name": "x"}), 422)
    assert {e["field"] for e in body["errors"]} == {"source", "start", "end", "audience"}
    assert counts() == before


def test_scopes_and_unknown_experiment(client: Any, anonymous: Any, experiment: Any,
                                       token_for: Any) -> None:
    reader = {"Authorization": f"Bearer {token_for('read')}"}
    assert_problem(anonymous.post(URL, json=VALID, headers=reader), 403)
    assert_problem(anonymous.get(URL, headers={"Authorization": ""}), 401)
    assert anonymous.get(URL, headers=reader).json() == {"items": []}
    assert_problem(client.post("/v1/experiments/nowhere/campaigns", json=VALID), 404,
                   "not-found")
    assert_problem(client.get("/v1/experiments/nowhere/campaigns"), 404, "not-found")


def test_the_list_carries_every_campaign_with_its_check(client: Any, experiment: Any) -> None:
    register(client, name="late", start="2026-11-15", end="2026-11-15",
             audience={"control": 0.1, "cards": 0.1})
    created = register(client, name="early", expected_size=2000)
    listed = client.get(URL).json()["items"]
    assert [c["name"] for c in listed] == ["early", "late"]
    early = {k: v for k, v in created.items() if k not in ("diagnosis", "alerts")}
    assert listed[0] == early
    assert listed[1]["check"]["balanced"] is True


def test_a_registered_campaign_is_named_on_its_flagged_days(client: Any,
                                                            experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    before = client.get("/v1/experiments/route-cards/diagnosis").json()
    assert all(day["campaigns"] == [] for day in before["flagged_days"])
    # The scenario's newsletter: only users who see the cards, on its two days.
    answer = register(client, name="new-route-cards", start=NEWSLETTER_DAYS[0],
                      end=NEWSLETTER_DAYS[-1], audience={"cards": 0.25})
    # A push on the same days does not explain an excess that came through the newsletter.
    register(client, name="weekend-push", source="push", start=NEWSLETTER_DAYS[0],
             end=NEWSLETTER_DAYS[-1], audience={"control": 0.3, "cards": 0.3})
    assert answer["diagnosis"]["status"] == "alert"
    assert answer["diagnosis"]["version"] > 1
    assert answer["check"]["size_basis"] == "recent_traffic"
    diagnosis = client.get("/v1/experiments/route-cards/diagnosis").json()
    named = {day["date"]: day for day in diagnosis["flagged_days"] if day["campaigns"]}
    assert set(named) == set(NEWSLETTER_DAYS)
    for day in named.values():
        assert day["campaigns"] == ["new-route-cards"]
        assert "campaign new-route-cards was running" in day["reasons"]
    assert ("explained by the registered campaign new-route-cards"
            in diagnosis["incidents"][0]["summary"])
    # The incident names the campaign and says it explains the inflow.
    [incident] = client.get("/v1/experiments/route-cards/incidents").json()["items"]
    assert incident["campaigns"] == ["new-route-cards"]
    assert incident["explained_by"].startswith(
        "Explained by the registered campaign new-route-cards")
    assert diagnosis["incidents"][0]["explained_by"] == incident["explained_by"]


def test_a_campaign_registered_before_the_data_is_named_once_it_arrives(
        client: Any, experiment: Any) -> None:
    answer = register(client, name="new-route-cards", start=NEWSLETTER_DAYS[0],
                      end=NEWSLETTER_DAYS[-1], audience={"cards": 0.25})
    assert answer["diagnosis"] is None
    assert answer["check"]["size_basis"] == "unknown"
    upload_csv(client, demo_csv_text())
    diagnosis = client.get("/v1/experiments/route-cards/diagnosis").json()
    assert {d["date"] for d in diagnosis["flagged_days"] if d["campaigns"]} == set(
        NEWSLETTER_DAYS)


def test_the_status_page_lists_campaigns_and_the_sensitivity(client: Any,
                                                            experiment: Any) -> None:
    upload_csv(client, demo_csv_text())
    register(client, name="new-route-cards", start=NEWSLETTER_DAYS[0],
             end=NEWSLETTER_DAYS[-1], audience={"cards": 0.25})
    page = client.get("/experiments/route-cards")
    assert page.status_code == 200
    campaigns = page.text.split('id="campaigns"', 1)[1].split("</section>", 1)[0]
    assert "new-route-cards" in campaigns and "unbalanced" in campaigns
    assert "intent to treat" in campaigns
    summary = client.get("/v1/experiments/route-cards/sensitivity").json()["summary"]
    sensitivity = page.text.split('id="sensitivity"', 1)[1].split("</div>", 1)[0]
    assert summary in html.unescape(sensitivity)
