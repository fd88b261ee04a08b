"""Polling support on the real routes: ETag / If-None-Match / Cache-Control, and CORS."""

from __future__ import annotations

from typing import Any

import pytest
from apihelpers import EXPERIMENT, demo_csv_text, upload_csv
from fastapi.testclient import TestClient

from service.app import create_app
from service.http_cache import REVALIDATE
from service.settings import Settings


@pytest.mark.parametrize("path", ["/v1/experiments/route-cards/diagnosis",
                                  "/v1/experiments/route-cards/series",
                                  "/v1/alerts?experiment=route-cards"])
def test_polled_documents_revalidate_with_etags(client: Any, path: str) -> None:
    client.post("/v1/experiments", json=EXPERIMENT)
    upload_csv(client, demo_csv_text())
    first = client.get(path)
    assert first.status_code == 200
    tag = first.headers["etag"]
    assert tag.startswith('"') and not tag.startswith("W/")
    assert first.headers["cache-control"] == REVALIDATE
    again = client.get(path, headers={"If-None-Match": tag})
    assert again.status_code == 304 and again.content == b""
    assert again.headers["etag"] == tag


def test_alert_list_tag_changes_when_an_alert_changes(client: Any) -> None:
    client.post("/v1/experiments", json=EXPERIMENT)
    upload_csv(client, demo_csv_text())
    first = client.get("/v1/alerts")
    alert_id = first.json()["items"][0]["id"]
    client.post(f"/v1/alerts/{alert_id}/acknowledge", json={"note": "checking the newsletter"})
    after = client.get("/v1/alerts", headers={"If-None-Match": first.headers["etag"]})
    assert after.status_code == 200 and after.headers["etag"] != first.headers["etag"]


def test_cors_is_off_by_default_and_configurable(settings: Settings, client: Any,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    plain = client.get("/healthz", headers={"Origin": "https://dash.larkspur.example"})
    assert "access-control-allow-origin" not in plain.headers
    monkeypatch.setenv("INRUSH_CORS_ORIGINS", "https://dash.larkspur.example, "
                                              "https://ops.larkspur.example")
    with TestClient(create_app(settings)) as browser:
        preflight = browser.options("/v1/alerts", headers={
            "Origin": "https://dash.larkspur.example", "Access-Control-Request-Method": "GET",
            "Access-Control-Request-Headers": "authorization, if-none-match"})
        assert preflight.status_code == 200
        assert preflight.headers["access-control-allow-origin"] == (
            "https://dash.larkspur.example")
        denied = browser.get("/healthz", headers={"Origin": "https://elsewhere.example"})
        assert "access-control-allow-origin" not in denied.headers
        allowed = browser.get("/v1/alerts", headers={"Origin": "https://ops.larkspur.example"})
        assert allowed.status_code == 401  # CORS headers on errors too
        assert allowed.headers["access-control-allow-origin"] == "https://ops.larkspur.example"
        assert "etag" in allowed.headers.get("access-control-expose-headers", "").lower()
