"""Scheduled pulls: the config set through the API (admin only, keys checked), runs claimed
once per experiment and day, their reports and errors on the pull resource and status page."""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest
from apihelpers import assert_problem
from fastapi.testclient import TestClient

from service.warehouse.schedule import FAILED, OK, run_due
from tests.warehouse.pulldata import reference_crossed, unit_data, write_parquet

EXPERIMENT = {"id": "trail-nightly", "title": "Pulled nightly",
              "start_date": "2026-02-20", "arms": ["control", "variant", "wide"],
              "allocation": [{"from": "2026-02-20", "weights": [0.45, 0.45, 0.10]}]}
NOW = dt.datetime(2026, 3, 11, 8, 0, tzinfo=dt.UTC)  # 01:00 on 11 March in Los Angeles
AT = dt.time(6, 0)


@pytest.fixture(scope="module")
def folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("pull-schedule")
    write_parquet(path, *unit_data())
    return path


def _config(folder: Path, exposures: str = "exposures/*.parquet") -> dict[str, Any]:
    return {"warehouse": {"url": "duckdb://"},
            "exposures": {"files": f"{folder}/{exposures}", "unit": "user_id", "arm": "arm",
                          "time": "exposed_at", "source": "entry_source",
                          "timezone": "America/Los_Angeles"},
            "metrics": [{"name": "spend_3d", "files": f"{folder}/orders.parquet",
                         "unit": "user_id", "time": "ordered_at", "value": "amount",
                         "window_days": 3}]}


def _run(client: TestClient) -> list[Any]:
    return run_due(client.app.state.database, at=AT, now=NOW, future_days=1)


def test_config_is_checked_and_needs_admin(client: TestClient, folder: Path,
                                           token_for: Callable[[str], str]) -> None:
    assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
    url = f"/v1/experiments/{EXPERIMENT['id']}/pull"
    bad = _config(folder)
    del bad["exposures"]["unit"]
    body = assert_problem(client.put(url, json={"config": bad}), 422)
    assert [e["field"] for e in body["errors"]] == ["exposures.unit"]
    writer = token_for("write")
    answer = client.put(url, json={"config": _config(folder)},
                        headers={"Authorization": f"Bearer {writer}"})
    assert_problem(answer, 403)
    assert_problem(client.get(url), 404)
    assert client.put(url, json={"config": _config(folder)}).status_code == 200
    shown = client.get(url).json()
    assert shown["runs"] == [] and shown["config"]["exposures"]["unit"] == "user_id"
    assert client.delete(url).status_code == 204
    assert_problem(client.get(url), 404)


def test_daily_run_stores_the_cube_once_and_reports(client: TestClient, folder: Path) -> None:
    assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
    url = f"/v1/experiments/{EXPERIMENT['id']}/pull"
    assert client.put(url, json={"config": _config(folder)}).status_code == 200
    early = NOW.replace(hour=5)
    assert run_due(client.app.state.database, at=AT, now=early, future_days=1) == []
    [outcome] = _run(client)
    assert outcome.state == OK, outcome.error
    assert outcome.as_of == dt.date(2026, 3, 10)
    assert _run(client) == []  # the day is claimed: no second run
    [run] = client.get(url).json()["runs"]
    assert run["state"] == OK and run["written"] > 0
    assert run["report"]["crossed_units"] == reference_crossed(unit_data()[0])
    rows = client.get(f"/v1/experiments/{EXPERIMENT['id']}/observations").json()["rows"]
    assert sum(r["entered"] for r in rows) == run["report"]["units"]
    page = client.get(f"/experiments/{EXPERIMENT['id']}").text
    assert "Daily pull" in page and "exposed to more than one arm" in page


def test_failed_run_is_recorded_with_the_key(client: TestClient, folder: Path,
                                             counts: Callable[[], dict[str, int]]) -> None:
    assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
    url = f"/v1/experiments/{EXPERIMENT['id']}/pull"
    config = _config(folder, exposures="missing/*.parquet")
    assert client.put(url, json={"config": config}).status_code == 200
    [outcome] = _run(client)
    assert outcome.state == FAILED and "exposures.files" in (outcome.error or "")
    assert counts()["observations"] == 0
    [run] = client.get(url).json()["runs"]
    assert run["state"] == FAILED and "exposures.files" in run["error"]
    assert "failed" in client.get(f"/experiments/{EXPERIMENT['id']}").text


def test_a_reported_run_past_the_stored_range_is_refused_and_nothing_is_kept(
        client: TestClient, counts: Callable[[], dict[str, int]]) -> None:
    # Found by the schemathesis fuzz run on PostgreSQL: 2^57 rows written reached the 32-bit
    # column and answered 500.
    assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
    url = f"/v1/experiments/{EXPERIMENT['id']}/pull/runs"
    before = counts()
    body = assert_problem(client.post(url, json={"as_of": "2026-03-10", "written": 2**57,
                                                 "report": {}}), 422)
    assert [e["field"] for e in body["errors"]] == ["written"]
    assert counts() == before
    accepted = client.post(url, json={"as_of": "2026-03-10", "written": 2**31 - 1,
                                      "report": {}})
    assert accepted.status_code in (200, 201), accepted.text
