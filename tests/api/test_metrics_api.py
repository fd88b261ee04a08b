"""``GET /metrics``: per-experiment gauges from the database, request metrics, optional token."""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

import httpx
import pytest
from apihelpers import EXPERIMENT, demo_csv_text, upload_csv
from fastapi.testclient import TestClient
from inrush_process import inrush_serve
from prometheus_client.parser import text_string_to_metric_families

from service.app import create_app
from service.settings import Settings


def families(text: str) -> dict[str, Any]:
    # prometheus-client's own parser (the reference implementation) must accept the text.
    return {f.name: f for f in text_string_to_metric_families(text)}


def gauge(found: dict[str, Any], name: str, experiment: str) -> float | None:
    for sample in found[name].samples:
        if sample.labels.get("experiment") == experiment:
            return float(sample.value)
    return None


def test_gauges_match_the_diagnosis_and_alerts(client: Any, anonymous: Any) -> None:
    client.post("/v1/experiments", json=EXPERIMENT)
    client.post("/v1/experiments", json={**EXPERIMENT, "id": "trail-badges"})
    upload_csv(client, demo_csv_text())
    diagnosis = client.get("/v1/experiments/route-cards/diagnosis").json()
    alerts = client.get("/v1/alerts", params={"experiment": "route-cards",
                                              "status": ["open", "acknowledged"]}).json()
    client.post(f"/v1/alerts/{alerts['items'][0]['id']}/resolve", json={"note": "seen"})
    response = anonymous.get("/metrics", headers={"Authorization": ""})
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/plain")
    found = families(response.text)
    assert gauge(found, "inrush_open_alerts", "route-cards") == len(alerts["items"]) - 1
    assert gauge(found, "inrush_open_alerts", "trail-badges") == 0
    # The demo's campaign is one open incident.
    assert gauge(found, "inrush_open_incidents", "route-cards") == len(
        diagnosis["incidents"]) == 1
    assert gauge(found, "inrush_open_incidents", "trail-badges") == 0
    assert gauge(found, "inrush_srm_p_value", "route-cards") == pytest.approx(
        diagnosis["srm"]["p_value"])
    assert gauge(found, "inrush_srm_p_value", "trail-badges") is None  # no data, no value
    assert gauge(found, "inrush_flagged_days", "route-cards") == sum(
        d["severity"] == "alert" for d in diagnosis["flagged_days"])
    as_of = dt.datetime.combine(dt.date.fromisoformat(diagnosis["as_of"]), dt.time(),
                                tzinfo=dt.UTC)
    assert gauge(found, "inrush_last_data_date_seconds", "route-cards") == as_of.timestamp()
    requests = [s for s in found["inrush_http_requests"].samples
                if s.name == "inrush_http_requests_total"
                and s.labels["route"] == "/v1/experiments/{experiment_id}/diagnosis"]
    # The registry is process-wide, so earlier tests may have added other statuses.
    assert any(s.labels["status"] == "200" and s.value >= 1 for s in requests)
    latency = {s.labels.get("route") for s in found["inrush_http_request_duration_seconds"].samples}
    assert "/v1/alerts/{alert_id}/resolve" in latency
    assert not any("route-cards" in (route or "") for route in latency)  # templates only


def test_metrics_token_is_required_when_configured(settings: Settings,
                                                   monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("INRUSH_METRICS_TOKEN", "scrape-the-trails")
    with TestClient(create_app(settings), raise_server_exceptions=False) as client:
        assert client.get("/metrics").status_code == 401
        assert client.get("/metrics", headers={"Authorization": "Bearer wrong"}
                          ).status_code == 401
        ok = client.get("/metrics", headers={"Authorization": "Bearer scrape-the-trails"})
        assert ok.status_code == 200 and "inrush_metrics_database_up 1.0" in ok.text


@pytest.mark.slow
def test_every_worker_process_reports_the_same_request_counts(tmp_path: Path) -> None:
    with inrush_serve(tmp_path, workers=2) as (base, _):
        for _ in range(30):  # a new connection each: they land on either worker
            assert httpx.get(f"{base}/healthz", timeout=10).status_code == 200
        seen = set()
        for _ in range(6):
            found = families(httpx.get(f"{base}/metrics", timeout=10).text)
            seen.add(sum(s.value for s in found["inrush_http_requests"].samples
                         if s.name == "inrush_http_requests_total"
                         and s.labels["route"] == "/healthz"))
    # The startup health checks count too; what matters is that no scrape misses the 30.
    assert min(seen) >= 30
