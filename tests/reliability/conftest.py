"""Fixtures of the reliability tests: a seeded service per backend, shared by a module.

``seeded`` is an app (in-process, TestClient) on a database holding the demo experiment with
its observations, diagnosis and alerts; it is built once per module and backend
(``INRUSH_TEST_BACKENDS``, default ``sqlite,postgres``; PostgreSQL is skipped, with the
reason, only when its server cannot be reached).
"""

from __future__ import annotations

import secrets
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient

from service.app import create_app
from service.settings import Settings
from tests.backends import backend_database, backend_params
from tests.reliability.support import DEMO_CSV, EXPERIMENT

ADMIN_TOKEN = "rel-admin-" + secrets.token_hex(8)
MAX_BODY_BYTES = 256 * 1024
MAX_ROWS = 500


@dataclass
class Seeded:
    """A running app with the demo experiment, its data and alerts."""

    app: FastAPI
    client: TestClient  # holds the admin token
    backend: str
    alert_ids: list[int]

    @property
    def engine(self) -> Any:
        return self.app.state.database.engine


@pytest.fixture(scope="module", params=backend_params())
def backend_url(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
                ) -> Iterator[str]:
    """A fresh database for the module, on each backend."""
    with backend_database(request.param, tmp_path_factory.mktemp("db"), "inrush_rel") as url:
        yield url


def seed_demo(client: TestClient) -> list[int]:
    """Create the demo experiment and upload its export; the ids of the alerts it opened."""
    created = client.post("/v1/experiments", json=EXPERIMENT)
    assert created.status_code == 201, created.text
    written = client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                         content=DEMO_CSV.read_bytes(), headers={"Content-Type": "text/csv"})
    assert written.status_code == 200, written.text
    alerts = client.get("/v1/alerts", params={"experiment": EXPERIMENT["id"]}).json()["items"]
    assert alerts, "the demo scenario opens alerts"
    return [a["id"] for a in alerts]


@pytest.fixture(scope="module")
def seeded(backend_url: str) -> Iterator[Seeded]:
    settings = Settings(database_url=backend_url, admin_token=ADMIN_TOKEN, public_url=None,
                        max_body_bytes=MAX_BODY_BYTES, max_rows=MAX_ROWS)
    app = create_app(settings)
    with TestClient(app, raise_server_exceptions=False) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN_TOKEN}"
        yield Seeded(app, client, "postgres" if "postgresql" in backend_url else "sqlite",
                     seed_demo(client))
