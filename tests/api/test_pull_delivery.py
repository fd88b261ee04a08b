"""A pulled cube reaches the service whole, by HTTP or straight into its database, through
the same validation as any upload; a cube naming an undeclared arm writes nothing."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from detectors.errors import InputError
from service.warehouse.config import parse_config
from service.warehouse.deliver import store, upload_with
from service.warehouse.pull import PullResult, run_pull
from tests.warehouse.pulldata import AS_OF, CONFIG, cube_frame, unit_data, write_parquet

EXPERIMENT = {"id": "trail-pull", "title": "Pulled from the warehouse",
              "start_date": "2026-02-20", "arms": ["control", "variant", "wide"],
              "allocation": [{"from": "2026-02-20", "weights": [0.45, 0.45, 0.10]}]}


@pytest.fixture(scope="module")
def pulled(tmp_path_factory: pytest.TempPathFactory) -> PullResult:
    folder = tmp_path_factory.mktemp("pull-delivery")
    write_parquet(folder, *unit_data())
    text = CONFIG.format(url="duckdb://", exposures='files = "exposures/*.parquet"',
                         orders='files = "orders.parquet"')
    return run_pull(parse_config(text, base=folder), AS_OF)


def _stored(client: TestClient) -> list[dict[str, object]]:
    response = client.get(f"/v1/experiments/{EXPERIMENT['id']}/observations")
    assert response.status_code == 200, response.text
    return [r for r in response.json()["rows"] if r["entered"] > 0]


def test_upload_writes_the_whole_cube(client: TestClient, pulled: PullResult) -> None:
    assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
    done = upload_with(client, pulled.cube, experiment=EXPERIMENT["id"],
                       report=pulled.report())
    assert "report_error" not in done.detail
    # Zero rows complete every (date, source) for each declared arm.
    assert done.written >= len(pulled.cube.rows)
    assert done.status in ("healthy", "watch", "alert")
    got = cube_frame(_stored(client))
    want = cube_frame(pulled.cube.rows)
    assert got[["date", "arm", "source", "entered"]].equals(
        want[["date", "arm", "source", "entered"]])
    assert (got["spend_3d.sum_sq"].astype(float).tolist()
            == want["spend_3d.sum_sq"].astype(float).tolist())
    # The report travels with it: crossed units on the pull resource and the status page.
    [run] = client.get(f"/v1/experiments/{EXPERIMENT['id']}/pull").json()["runs"]
    assert run["report"]["crossed_units"] == pulled.cube.crossed_units > 0
    assert run["written"] == done.written and run["as_of"] == "2026-03-10"
    page = client.get(f"/experiments/{EXPERIMENT['id']}").text
    assert f"{pulled.cube.crossed_units} units" in page


def test_undeclared_arm_writes_nothing(client: TestClient, pulled: PullResult,
                                       counts: Callable[[], dict[str, int]]) -> None:
    narrow = {**EXPERIMENT, "arms": ["control", "variant"],
              "allocation": [{"from": "2026-02-20", "weights": [0.5, 0.5]}]}
    assert client.post("/v1/experiments", json=narrow).status_code == 201
    before = counts()
    with pytest.raises(InputError) as error:
        upload_with(client, pulled.cube, experiment=EXPERIMENT["id"])
    assert "wide" in str(error.value) and error.value.problems[0].field == "arm"
    with pytest.raises(InputError):
        store(pulled.cube, database_url=client.app.state.settings.database_url,
              experiment=EXPERIMENT["id"])
    assert counts() == before


def test_store_goes_through_the_ingest_path(client: TestClient, pulled: PullResult,
                                            tmp_path: Path) -> None:
    assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
    url = client.app.state.settings.database_url
    done = store(pulled.cube, database_url=url, experiment=EXPERIMENT["id"])
    assert done.status in ("healthy", "watch", "alert")
    assert cube_frame(_stored(client))[["date", "arm", "source", "entered"]].equals(
        cube_frame(pulled.cube.rows)[["date", "arm", "source", "entered"]])
    diagnosis = client.get(f"/v1/experiments/{EXPERIMENT['id']}/diagnosis")
    assert diagnosis.status_code == 200
    # Re-running the same pull replaces rows, it does not add any.
    again = store(pulled.cube, database_url=url, experiment=EXPERIMENT["id"])
    assert again.detail["inserted"] == 0
    with pytest.raises(InputError) as error:
        store(pulled.cube, database_url=url, experiment="no-such-experiment")
    assert error.value.problems[0].field == "experiment"


def test_demo_logs_pulled_show_the_campaign_days(client: TestClient,
                                                 capsys: pytest.CaptureFixture[str]) -> None:
    from service.cli.pull import feed_demo

    feed_demo(client)
    assert "exposed to more than one arm" in capsys.readouterr().out
    diagnosis = client.get("/v1/experiments/route-cards/diagnosis").json()
    # The shipped logs hold a tenth of the scenario's traffic: the campaign is an inflow into
    # cards, at the watch level or beyond (its lifetime-valid p-value is near the alert level).
    assert diagnosis["status"] in {"watch", "alert"}
    [incident] = diagnosis["incidents"]
    assert (incident["shape"], incident["arm"]) == ("inflow", "cards")
    # The scenario's newsletter days (service/demo/scenario.py: days 15 and 16).
    assert {"2026-11-09", "2026-11-10"} <= {d["date"] for d in diagnosis["flagged_days"]}
