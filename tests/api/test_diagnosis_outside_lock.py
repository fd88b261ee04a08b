"""Uploads store rows in one short transaction and diagnose outside the write lock; a result
computed from data changed meanwhile is not stored; diagnoses owed after a stop catch up."""

from __future__ import annotations

import threading
from collections.abc import Callable
from typing import Any

import pytest
from apihelpers import EXPERIMENT, demo_csv_text, upload_csv
from fastapi import FastAPI
from sqlalchemy import func, select

import service.analysis
from service.catch_up import catch_up
from service.db.models import Alert, AlertEvent, DiagnosisSnapshot, Experiment
from service.settings import Settings
from service.table_cache import cache_for

OTHER = {**EXPERIMENT, "id": "route-cards-2"}
WAIT = 60.0  # seconds; only reached if the behaviour under test is broken


@pytest.fixture
def settings(settings: Settings) -> Settings:
    """The catch-up thread runs at startup only: the tests call it themselves."""
    return settings.model_copy(update={"catch_up_seconds": 0})


class Gate:
    """Wraps the detectors' ``diagnose``: the first call for ``experiment`` waits until
    released, after telling that it has started."""

    def __init__(self, experiment: str) -> None:
        self.experiment = experiment
        self.started = threading.Event()
        self.release = threading.Event()
        self.calls: list[str] = []
        self._original = service.analysis.diagnose

    def __call__(self, *args: Any, **kwargs: Any) -> Any:
        self.calls.append(kwargs.get("experiment", ""))
        if kwargs.get("experiment") == self.experiment and not self.started.is_set():
            self.started.set()
            assert self.release.wait(WAIT), "never released"
        return self._original(*args, **kwargs)


def _in_thread(action: Callable[[], Any]) -> tuple[threading.Thread, list[Any]]:
    out: list[Any] = []
    thread = threading.Thread(target=lambda: out.append(action()), daemon=True)
    thread.start()
    return thread, out


def _half(text: str, first: bool) -> str:
    header, *lines = text.splitlines()
    middle = len(lines) // 2
    return "\n".join([header, *(lines[:middle] if first else lines[middle:])]) + "\n"


def _put(client: Any, experiment_id: str, text: str) -> Any:
    return client.put(f"/v1/experiments/{experiment_id}/observations",
                      content=text.encode(), headers={"Content-Type": "text/csv"})


def test_another_experiments_upload_does_not_wait_for_a_diagnosis(
        client: Any, experiment: dict[str, Any], monkeypatch: pytest.MonkeyPatch) -> None:
    assert client.post("/v1/experiments", json=OTHER).status_code == 201
    gate = Gate("route-cards")
    monkeypatch.setattr(service.analysis, "diagnose", gate)
    slow, answers = _in_thread(lambda: _put(client, "route-cards", demo_csv_text()))
    try:
        assert gate.started.wait(WAIT)
        # The first upload's rows are committed and its diagnosis is running: another
        # experiment's upload (and a read of the first one's rows) complete meanwhile.
        other, other_answer = _in_thread(lambda: _put(client, OTHER["id"], demo_csv_text()))
        other.join(WAIT)
        assert not other.is_alive(), "the upload waited for another experiment's diagnosis"
        assert other_answer[0].status_code == 200, other_answer[0].text
        assert len(client.get("/v1/experiments/route-cards/observations").json()["rows"]) == 224
        assert slow.is_alive()
    finally:
        gate.release.set()
        slow.join(WAIT)
    assert answers[0].status_code == 200, answers[0].text
    assert answers[0].json()["diagnosis"]["status"] == "alert"


def test_a_result_overtaken_by_newer_data_is_not_stored(
        app: FastAPI, client: Any, experiment: dict[str, Any],
        monkeypatch: pytest.MonkeyPatch) -> None:
    text = demo_csv_text()
    upload_csv(client, _half(text, first=True))
    gate = Gate("route-cards")
    monkeypatch.setattr(service.analysis, "diagnose", gate)
    # A re-upload of the first half blocks in its diagnosis; the second half arrives and is
    # diagnosed and stored meanwhile.
    slow, answers = _in_thread(lambda: _put(client, "route-cards", _half(text, first=True)))
    try:
        assert gate.started.wait(WAIT)
        newer = upload_csv(client, _half(text, first=False))
    finally:
        gate.release.set()
        slow.join(WAIT)
    assert answers[0].status_code == 200, answers[0].text
    # The overtaken computation was dropped and done again on the newer data: three calls
    # (blocked, newer upload, repeat), and the answer names the diagnosis of all rows.
    assert gate.calls.count("route-cards") == 3
    with app.state.database.sessions() as session:
        current = session.get(Experiment, "route-cards")
        assert current is not None
        snapshots = list(session.scalars(select(DiagnosisSnapshot).where(
            DiagnosisSnapshot.experiment_id == "route-cards").order_by(DiagnosisSnapshot.version)))
        assert snapshots[-1].data_version == current.data_version
        assert [s.data_version for s in snapshots] == sorted(s.data_version for s in snapshots)
        # Every alert opened once, with one "opened" event each.
        alerts = session.scalar(select(func.count()).select_from(Alert))
        opened = session.scalar(select(func.count()).select_from(AlertEvent)
                                .where(AlertEvent.action == "opened"))
        assert alerts and opened == alerts
    assert answers[0].json()["diagnosis"]["version"] >= newer["diagnosis"]["version"]
    assert client.get("/v1/experiments/route-cards/diagnosis").json()["status"] == "alert"


def test_a_diagnosis_owed_after_a_stop_is_caught_up_once(
        app: FastAPI, client: Any, experiment: dict[str, Any],
        monkeypatch: pytest.MonkeyPatch) -> None:
    upload_csv(client, _half(demo_csv_text(), first=True))

    def stopped(*args: Any, **kwargs: Any) -> Any:
        raise SystemError("the process stopped here")

    # The rows commit, then the process "stops" before the diagnosis is stored.
    monkeypatch.setattr("service.routers.observations.rediagnose", stopped)
    assert _put(client, "route-cards", _half(demo_csv_text(), first=False)).status_code == 500
    monkeypatch.undo()
    assert len(client.get("/v1/experiments/route-cards/observations").json()["rows"]) == 224
    before = client.get("/v1/experiments/route-cards/diagnosis").json()
    cache_for(app.state.database.engine).clear()  # as after a restart
    found = catch_up(app.state.database, seen={})  # a later pass: not seen before, left alone
    assert list(found) == ["route-cards"]
    assert client.get("/v1/experiments/route-cards/diagnosis").json() == before
    assert list(catch_up(app.state.database, seen=found)) == ["route-cards"]  # still stale
    after = client.get("/v1/experiments/route-cards/diagnosis").json()
    assert after["as_of"] > before["as_of"]
    assert catch_up(app.state.database) == {}
