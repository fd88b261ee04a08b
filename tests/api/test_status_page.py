"""The HTML status pages: token handling, content, and agreement with the JSON API."""

from __future__ import annotations

import io
import re
from typing import Any

import pandas as pd
from apihelpers import EXPERIMENT, demo_csv_text, two_metric_demo_csv, upload_csv


def login(anonymous: Any, token: str, path: str = "/experiments/route-cards") -> Any:
    joiner = "&" if "?" in path else "?"
    return anonymous.get(f"{path}{joiner}token={token}", follow_redirects=False)


def test_without_a_token_the_page_asks_for_one(anonymous: Any) -> None:
    response = anonymous.get("/experiments/route-cards")
    assert response.status_code == 401
    assert response.headers["content-type"].startswith("text/html")
    assert 'name="token"' in response.text and "read scope" in response.text
    assert "route-cards" not in response.text.split("<main>", 1)[1].split("form", 1)[0]


def test_query_token_sets_a_strict_httponly_cookie_and_leaves_the_url(
        anonymous: Any, token_for: Any) -> None:
    token = token_for("read")
    response = login(anonymous, token, "/experiments/route-cards?tab=effect")
    assert response.status_code == 303
    assert response.headers["location"] == "/experiments/route-cards?tab=effect"
    cookie = response.headers["set-cookie"]
    assert cookie.startswith(f"inrush_token={token};")
    for attribute in ("HttpOnly", "SameSite=strict", "Path=/experiments"):
        assert attribute.lower() in cookie.lower()
    assert login(anonymous, "inr_not-a-token").status_code == 401


def test_bearer_header_works_and_a_stale_cookie_is_dropped(anonymous: Any,
                                                          token_for: Any) -> None:
    token = token_for("read")
    assert anonymous.get("/experiments", headers={"Authorization": f"Bearer {token}"}
                         ).status_code == 200
    anonymous.cookies.set("inrush_token", "inr_revoked-long-ago", path="/experiments")
    response = anonymous.get("/experiments")
    assert response.status_code == 401 and "no longer accepted" in response.text
    assert "inrush_token=" in response.headers["set-cookie"]


def test_page_shows_status_alerts_charts_and_the_effect(client: Any, anonymous: Any,
                                                        token_for: Any) -> None:
    client.post("/v1/experiments", json=EXPERIMENT)
    upload_csv(client, demo_csv_text())
    diagnosis = client.get("/v1/experiments/route-cards/diagnosis").json()
    alerts = client.get("/v1/alerts", params={"experiment": "route-cards"}).json()["items"]
    # The page shows what the reweight endpoint answers without options (the honest default).
    effect = client.post("/v1/experiments/route-cards/reweight",
                         json={"metric": "routes_saved"}).json()
    del client.headers["Authorization"]
    assert login(anonymous, token_for("read")).status_code == 303
    page = anonymous.get("/experiments/route-cards")
    assert page.status_code == 200
    html = page.text
    assert "Route cards on the trail list" in html
    assert diagnosis["status"] == "alert" and "\u25a0 Alert" in html
    assert page.headers["cache-control"] == "private, no-store"
    csp = page.headers["content-security-policy"]
    assert "default-src 'none'" in csp and "script-src 'self';" in csp
    # Four server-drawn charts (three as the fallback without JavaScript); scripts come from
    # this server's /static only, and nothing from elsewhere.
    assert html.count("<svg") == 4
    assert not re.search(r'src="https?://', html) and "<link" in html
    for tag in re.findall(r"<script\b[^>]*>", html):
        assert 'type="application/json"' in tag or re.search(r'src="/static/[^"]+\?v=', tag)
    for title in ("Arm shares against the plan", "Entrants per source and arm",
                  "Entrant engagement per arm: routes_saved",
                  "Effect on routes_saved: naive and re-weighted by entry cohort"):
        assert title in html
    for alert in alerts:
        assert alert["title"].split(":")[0] in html
    for day in diagnosis["flagged_days"]:
        assert day["date"] in html
    # The effect on the page is the API's re-weighting to the reference arm by source x window.
    adjusted = effect["comparisons"][0]["adjusted"]
    naive = effect["comparisons"][0]["naive"]
    assert f"{adjusted['difference']:+,.3f}" in html and f"{naive['difference']:+,.3f}" in html
    assert "not a randomised estimate" in html
    for line in diagnosis["advice"]:
        assert line.replace("'", "&#39;").replace('"', "&#34;")[:60] in html


def test_index_lists_experiments_with_their_status(client: Any, anonymous: Any,
                                                   token_for: Any) -> None:
    client.post("/v1/experiments", json=EXPERIMENT)
    client.post("/v1/experiments", json={**EXPERIMENT, "id": "trail-badges",
                                         "title": "Trail badges"})
    upload_csv(client, demo_csv_text())
    del client.headers["Authorization"]
    login(anonymous, token_for("read"), "/experiments")
    html = anonymous.get("/experiments").text
    assert '<a href="/experiments/route-cards">Route cards on the trail list</a>' in html
    assert '<a href="/experiments/trail-badges">Trail badges</a>' in html
    assert "\u25a0 Alert" in html and "\u25cb No data" in html
    missing = anonymous.get("/experiments/no-such-trail")
    assert missing.status_code == 404 and "no-such-trail" in missing.text


def test_page_without_data_says_so(client: Any) -> None:
    client.post("/v1/experiments", json=EXPERIMENT)
    html = client.get("/experiments/route-cards").text
    assert "No data" in html and "No unresolved alerts." in html
    assert "<svg" not in html


def test_metric_query_picks_the_chart_and_the_effect_and_the_files_are_served(
        client: Any, anonymous: Any, token_for: Any) -> None:
    client.post("/v1/experiments", json=EXPERIMENT)
    upload_csv(client, two_metric_demo_csv())
    expected = client.post("/v1/experiments/route-cards/reweight",
                           json={"metric": "trail_minutes"}).json()
    series = client.get("/v1/experiments/route-cards/series").json()
    del client.headers["Authorization"]
    login(anonymous, token_for("read"))
    html = anonymous.get("/experiments/route-cards", params={"metric": "trail_minutes"}).text
    assert '<option value="trail_minutes" selected>' in html
    assert "Entrant engagement per arm: trail_minutes" in html
    assert "Effect on trail_minutes: naive, honest estimate and bounds" in html
    assert f"{expected['comparisons'][0]['adjusted']['difference']:+,.3f}" in html
    assert "Entrant engagement per arm: routes_saved" not in html
    unknown = anonymous.get("/experiments/route-cards", params={"metric": "Trail_Minutes"})
    assert unknown.status_code == 200 and "There is no metric &#39;Trail_Minutes&#39;" in \
        unknown.text
    # The scripts the page names are served, cacheable for a year under their hash.
    for src in re.findall(r'<script src="([^"]+)"', html):
        script = anonymous.get(src)
        assert script.status_code == 200
        assert script.headers["content-type"].startswith("text/javascript")
        assert "immutable" in script.headers["cache-control"]
    missing = anonymous.get("/static/..%2Fsettings.py")
    assert missing.status_code == 404
    assert missing.headers["content-type"].startswith("application/problem+json")
    # The series as CSV, behind the same token as the page.
    csv_file = anonymous.get("/experiments/route-cards/series.csv")
    assert csv_file.status_code == 200 and csv_file.headers["content-type"].startswith("text/csv")
    table = pd.read_csv(io.StringIO(csv_file.text))
    assert len(table) == len(series["days"]) * len(series["arms"])
    assert list(table.columns[-2:]) == ["mean_routes_saved", "mean_trail_minutes"]
    anonymous.cookies.clear()
    assert anonymous.get("/experiments/route-cards/series.csv").status_code == 401
