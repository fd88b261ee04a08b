"""What a receiver answered is shown to write and admin tokens; a read token sees each
attempt's time, status and error without the receiver's text."""

from __future__ import annotations

from typing import Any

import pytest
from apihelpers import EXPERIMENT, demo_csv_text, upload_csv
from fastapi import FastAPI
from notify_receiver import running_receiver

from service.notify.settings import NotifySettings
from service.notify.worker import NotifyWorker


def test_read_tokens_do_not_see_receiver_replies(client: Any, app: FastAPI, token_for: Any,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("INRUSH_WEBHOOK_ALLOW_HOSTS", "127.0.0.1:*")
    # Two experiments, one incident each: two notifications, the first answered 500 and the
    # second redirected (one message per incident, so one experiment would send one).
    with running_receiver(planned=[500, 302]) as receiver:
        for experiment_id in ("route-cards", "route-cards-copy"):
            response = client.post("/v1/experiments", json={
                **EXPERIMENT, "id": experiment_id,
                "notify": {"webhook_url": f"{receiver.url}/hook"}})
            assert response.status_code == 201, response.text
            upload_csv(client, demo_csv_text(), experiment_id)
        worker = NotifyWorker(app.state.database, NotifySettings(
            webhook_allow_hosts="127.0.0.1:*", notify_worker=False))
        try:
            assert worker.run_once() >= 2
        finally:
            worker.client.close()
    incidents = client.get("/v1/incidents").json()["items"]
    assert len(incidents) == 2
    writer = {"Authorization": f"Bearer {token_for('write')}"}
    reader = {"Authorization": f"Bearer {token_for('read')}"}

    def attempts(headers: dict[str, str]) -> list[dict[str, Any]]:
        return [attempt for incident in incidents for item in client.get(
            f"/v1/incidents/{incident['id']}/deliveries", headers=headers).json()["items"]
            for attempt in item["history"]]

    full = {a["status_code"]: a for a in attempts(writer)}
    assert full[500]["response_excerpt"] == "trail closed"
    assert f"{receiver.url}/moved" in full[302]["error"]
    trimmed = {a["status_code"]: a for a in attempts(reader)}
    assert set(trimmed) == set(full)
    assert all(a["response_excerpt"] is None for a in trimmed.values())
    assert trimmed[500]["error"] == "answered 500"
    assert "moved" not in trimmed[302]["error"] and "redirect" in trimmed[302]["error"]
