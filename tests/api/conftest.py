"""Fixtures for the HTTP contract tests: an app on a fresh database per test.

The database comes from ``database_url`` (tests/conftest.py), parametrised over SQLite and
PostgreSQL, so every test here runs on both backends.
"""

from __future__ import annotations

import secrets
from collections.abc import Callable, Iterator
from typing import Any

import pytest
from apihelpers import EXPERIMENT
from fastapi import FastAPI
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from service.app import create_app
from service.db import load_models, models
from service.settings import Settings
from service.tokens import Scope, create_token

ADMIN_TOKEN = "test-admin-" + secrets.token_hex(8)


@pytest.fixture
def settings(database_url: str) -> Settings:
    return Settings(database_url=database_url, admin_token=ADMIN_TOKEN, public_url=None,
                    max_body_bytes=2 * 1024 * 1024, max_rows=5000)


@pytest.fixture
def app(settings: Settings) -> FastAPI:
    return create_app(settings)


@pytest.fixture
def anonymous(app: FastAPI) -> Iterator[TestClient]:
    """A client without credentials (entering it runs the migrations)."""
    with TestClient(app, raise_server_exceptions=False) as client:
        yield client


@pytest.fixture
def client(anonymous: TestClient) -> TestClient:
    """A client holding the bootstrap admin token."""
    anonymous.headers["Authorization"] = f"Bearer {ADMIN_TOKEN}"
    return anonymous


@pytest.fixture
def token_for(app: FastAPI, anonymous: TestClient) -> Callable[[str], str]:
    """Mint a stored token of a scope; returns the bearer value."""

    def mint(scope: str, name: str | None = None) -> str:
        with app.state.database.sessions.begin() as session:
            _, plain = create_token(session, Scope.parse(scope), name)
        return plain

    return mint


@pytest.fixture
def counts(app: FastAPI, anonymous: TestClient) -> Callable[[], dict[str, int]]:
    """Row counts of every table, to check that a refused request wrote nothing."""
    tables = load_models().sorted_tables

    def count() -> dict[str, int]:
        with app.state.database.sessions() as session:
            return {table.name: int(session.scalar(select(func.count()).select_from(table)) or 0)
                    for table in tables}

    return count


@pytest.fixture
def stored(app: FastAPI, anonymous: TestClient) -> Callable[[str], list[dict[str, Any]]]:
    """The stored observation rows of an experiment, straight from the database."""

    def rows(experiment_id: str) -> list[dict[str, Any]]:
        with app.state.database.sessions() as session:
            found = session.scalars(select(models.Observation).where(
                models.Observation.experiment_id == experiment_id).order_by(
                models.Observation.date, models.Observation.arm, models.Observation.source))
            return [{"date": o.date.isoformat(), "arm": o.arm, "source": o.source,
                     "entered": o.entered, "metrics": o.metrics} for o in found]

    return rows


@pytest.fixture
def experiment(client: TestClient) -> dict[str, Any]:
    """The demo experiment, created."""
    response = client.post("/v1/experiments", json=EXPERIMENT)
    assert response.status_code == 201, response.text
    return response.json()
