"""Notifications through the HTTP API: registration checks, upload -> outbox -> delivery, and
``GET /v1/incidents/{id}/deliveries``."""

from __future__ import annotations

import json
import threading
import time
from typing import Any

import pytest
from apihelpers import EXPERIMENT, assert_problem, corrected_demo_csv, demo_csv_text, upload_csv
from fastapi import FastAPI
from notify_receiver import running_receiver

from service.notify import signing
from service.notify.settings import NotifySettings
from service.notify.worker import NotifyWorker

SECRET = "whsec_bGFya3NwdXItdHJhaWxzLWtleQ=="



def deliver_all(app: FastAPI) -> int:
    worker = NotifyWorker(app.state.database, NotifySettings(webhook_allow_hosts="127.0.0.1:*",
                                                             notify_worker=False))
    try:
        return worker.run_once()
    finally:
        worker.client.close()


@pytest.mark.parametrize("url", ["http://127.0.0.1:9/hook", "http://localhost/hook",
                                 "http://169.254.169.254/latest/meta-data",
                                 "https://[::1]/hook", "http://10.20.30.40/hook",
                                 "http://[2002:a00:1::1]/hook", "http://93.184.215.14:0/hook"])
def test_internal_webhooks_are_refused_at_registration(client: Any, url: str,
                                                       counts: Any) -> None:
    before = counts()
    body = assert_problem(client.post("/v1/experiments", json={
        **EXPERIMENT, "notify": {"webhook_url": url, "secret": SECRET}}), 422)
    assert body["errors"][0]["field"] == "notify.webhook_url"
    assert counts() == before
    client.post("/v1/experiments", json=EXPERIMENT)
    body = assert_problem(client.patch("/v1/experiments/route-cards", json={
        "notify": {"webhook_url": url}}), 422)
    assert body["errors"][0]["field"] == "notify.webhook_url"
    assert client.get("/v1/experiments/route-cards").json()["notify"] is None


def test_upload_queues_and_the_worker_delivers(client: Any, app: FastAPI,
                                               monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("INRUSH_WEBHOOK_ALLOW_HOSTS", "127.0.0.1:*")
    with running_receiver(planned=[500]) as receiver:
        response = client.post("/v1/experiments", json={
            **EXPERIMENT, "notify": {"webhook_url": f"{receiver.url}/larkspur/inrush",
                                     "secret": SECRET}})
        assert response.status_code == 201, response.text
        upload_csv(client, demo_csv_text())
        assert receiver.requests == []  # the upload did not wait on the receiver
        [incident] = client.get("/v1/incidents",
                                params={"experiment": "route-cards"}).json()["items"]
        # Several findings stand behind the one episode; one message is sent for it.
        assert len(client.get("/v1/alerts", params={"experiment": "route-cards"})
                   .json()["items"]) > 1
        assert deliver_all(app) == 1 and len(receiver.requests) == 1
        retried = receiver.requests[0].headers["webhook-id"]
        time.sleep(0.05)
        # The 500 is retried later per the backoff schedule (15 to 30 s after it), not in
        # this pass.
        assert deliver_all(app) == 0
    [request] = receiver.requests
    assert signing.verify(SECRET, request.headers, request.body)
    body = json.loads(request.body)
    assert body["type"] == "incident.opened"
    assert body["data"]["experiment"]["id"] == "route-cards"
    assert body["data"]["incident"]["id"] == incident["id"]
    listing = client.get(f"/v1/incidents/{incident['id']}/deliveries").json()
    assert listing["webhook_configured"] is True and listing["incident"] == incident["id"]
    [delivery] = listing["items"]
    assert delivery["event_id"] == retried and delivery["event_type"] == "incident.opened"
    assert delivery["status"] == "pending" and delivery["attempts"] == 1
    assert delivery["next_attempt_at"] is not None
    assert delivery["history"][0]["status_code"] == 500
    assert delivery["history"][0]["error"] == "answered 500"


def test_corrected_data_sends_resolutions(client: Any, app: FastAPI,
                                          monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("INRUSH_WEBHOOK_ALLOW_HOSTS", "127.0.0.1:*")
    with running_receiver() as receiver:
        client.post("/v1/experiments", json={**EXPERIMENT, "notify": {
            "webhook_url": f"{receiver.url}/hook", "secret": SECRET}})
        upload_csv(client, demo_csv_text())
        deliver_all(app)
        opened = len(receiver.requests)
        upload_csv(client, corrected_demo_csv())
        deliver_all(app)
    types = [json.loads(r.body)["type"] for r in receiver.requests]
    assert opened == 1 and types == ["incident.opened", "incident.resolved"]
    resolved = json.loads(receiver.requests[1].body)
    assert resolved["data"]["incident"]["resolution"].startswith(
        "corrected data no longer supports it")
    ids = [r.headers["webhook-id"] for r in receiver.requests]
    assert len(ids) == len(set(ids))


def test_deliveries_need_read_scope_and_an_existing_alert(anonymous: Any,
                                                          token_for: Any) -> None:
    writer = {"Authorization": f"Bearer {token_for('write')}"}
    reader = {"Authorization": f"Bearer {token_for('read')}"}
    assert_problem(anonymous.get("/v1/alerts/1/deliveries"), 401)
    assert_problem(anonymous.get("/v1/incidents/1/deliveries"), 401)
    assert_problem(anonymous.get("/v1/alerts/999/deliveries", headers=reader), 404)
    assert_problem(anonymous.get("/v1/incidents/999/deliveries", headers=reader), 404)
    anonymous.post("/v1/experiments", json=EXPERIMENT, headers=writer)
    response = anonymous.put("/v1/experiments/route-cards/observations",
                             content=demo_csv_text().encode(),
                             headers={**writer, "Content-Type": "text/csv"})
    assert response.status_code == 200, response.text
    alert = anonymous.get("/v1/alerts", headers=reader).json()["items"][0]
    listing = anonymous.get(f"/v1/alerts/{alert['id']}/deliveries", headers=reader)
    assert listing.status_code == 200
    assert listing.json() == {"alert": alert["id"], "webhook_configured": False, "items": []}
    incident = anonymous.get("/v1/incidents", headers=reader).json()["items"][0]
    listing = anonymous.get(f"/v1/incidents/{incident['id']}/deliveries", headers=reader)
    assert listing.json() == {"incident": incident["id"], "webhook_configured": False,
                              "items": []}


def test_the_app_runs_the_worker_in_its_lifespan(settings: Any,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    from fastapi.testclient import TestClient

    from service.app import create_app

    monkeypatch.setenv("INRUSH_NOTIFY_WORKER", "1")
    monkeypatch.setenv("INRUSH_NOTIFY_POLL_SECONDS", "0.1")
    monkeypatch.setenv("INRUSH_WEBHOOK_ALLOW_HOSTS", "127.0.0.1:*")
    with running_receiver() as receiver:
        with TestClient(create_app(settings)) as client:
            client.headers["Authorization"] = f"Bearer {settings.admin_token.get_secret_value()}"
            client.post("/v1/experiments", json={**EXPERIMENT, "notify": {
                "webhook_url": f"{receiver.url}/hook", "secret": SECRET}})
            upload_csv(client, demo_csv_text())
            expected = len(client.get("/v1/incidents").json()["items"])
            assert expected == 1
            deadline = time.monotonic() + 20
            while len(receiver.requests) < expected and time.monotonic() < deadline:
                time.sleep(0.05)
        # Leaving the client ran the shutdown: the worker stopped with the app.
        assert len(receiver.requests) == expected
        assert not any(t.name == "inrush-notify" for t in threading.enumerate())
