"""Health, problem types, error handlers, migrations and the OpenAPI document."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path
from typing import Any

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from alembic.script import ScriptDirectory
from apihelpers import assert_problem
from fastapi.testclient import TestClient
from sqlalchemy import inspect, text

from service.app import create_app
from service.cli.server import openapi_text
from service.db import load_models
from service.db.session import alembic_config
from service.settings import Settings

OPENAPI_FILE = Path(__file__).resolve().parents[2] / "openapi" / "openapi.json"


def test_healthz_reports_the_database(anonymous: Any) -> None:
    response = anonymous.get("/healthz")
    assert response.status_code == 200
    assert response.json() == {"status": "ok", "database": "ok"}


def test_healthz_is_503_when_the_database_is_unreachable() -> None:
    # Port 9 (discard) on the loopback has no PostgreSQL: the connection is refused at once.
    settings = Settings(database_url="postgresql+psycopg://nobody@127.0.0.1:9/none",
                        migrate_on_start=False)
    with TestClient(create_app(settings), raise_server_exceptions=False) as client:
        body = assert_problem(client.get("/healthz"), 503, "service-unavailable")
    assert body["database"] == "unreachable"
    assert "nobody" not in json.dumps(body)


def test_problem_types_are_described(anonymous: Any) -> None:
    body = assert_problem(anonymous.get("/v1/nowhere"), 404)
    described = anonymous.get(body["type"].removeprefix("http://testserver"))
    assert described.status_code == 200
    assert described.json()["title"] == body["title"]
    assert_problem(anonymous.get("/problems/no-such-type"), 404)


def test_wrong_method_is_a_405_problem(client: Any) -> None:
    assert_problem(client.delete("/v1/experiments"), 405)


def test_unexpected_errors_are_500_problems_without_internals(settings: Settings) -> None:
    app = create_app(settings)

    @app.get("/boom")
    def boom() -> None:
        raise RuntimeError("connection string postgres://secret@db")

    with TestClient(app, raise_server_exceptions=False) as client:
        body = assert_problem(client.get("/boom"), 500, "internal-error")
    assert "secret" not in json.dumps(body)


def test_query_validation_errors_name_the_parameter(client: Any) -> None:
    body = assert_problem(client.get("/v1/alerts", params={"limit": 501}), 422)
    assert body["errors"][0]["field"] == "limit"
    assert body["errors"][0]["in"] == "query"


def _head(database_url: str) -> str | None:
    return ScriptDirectory.from_config(alembic_config(database_url)).get_current_head()


def test_migrations_create_exactly_the_models(app: Any, anonymous: Any,
                                              database_url: str) -> None:
    with app.state.database.engine.connect() as connection:
        context = MigrationContext.configure(connection, opts={"compare_type": True})
        assert compare_metadata(context, load_models()) == []
        assert context.get_current_revision() == _head(database_url)


def test_sqlite_connections_are_configured(app: Any, anonymous: Any, database_url: str) -> None:
    if not database_url.startswith("sqlite"):
        return
    with app.state.database.engine.connect() as connection:
        assert connection.execute(text("PRAGMA journal_mode")).scalar() == "wal"
        assert connection.execute(text("PRAGMA foreign_keys")).scalar() == 1
        assert connection.execute(text("PRAGMA busy_timeout")).scalar() == 30000


@pytest.mark.empty_database
def test_cli_db_upgrade_on_an_empty_database(database_url: str) -> None:
    env = {**os.environ, "INRUSH_DATABASE_URL": database_url}
    command = [sys.executable, "-m", "service.cli", "db"]
    upgraded = subprocess.run([*command, "upgrade"], env=env, capture_output=True, text=True,
                              timeout=120, check=False)
    assert upgraded.returncode == 0, upgraded.stderr
    current = subprocess.run([*command, "current"], env=env, capture_output=True, text=True,
                             timeout=120, check=False)
    assert current.stdout.strip() == _head(database_url)
    app = create_app(Settings(database_url=database_url, migrate_on_start=False))
    tables = set(inspect(app.state.database.engine).get_table_names())
    assert {"experiments", "observations", "diagnosis_snapshots", "alerts", "alert_events",
            "api_tokens"} <= tables
    app.state.database.dispose()


def test_openapi_is_served(anonymous: Any) -> None:
    document = anonymous.get("/openapi.json").json()
    assert "/v1/experiments/{experiment_id}/observations" in document["paths"]
    body = document["paths"]["/v1/experiments/{experiment_id}/observations"]["put"]
    assert set(body["requestBody"]["content"]) == {"application/json", "text/csv"}
    assert "ObservationBatch" in document["components"]["schemas"]


def test_committed_openapi_matches_the_app() -> None:
    assert OPENAPI_FILE.exists(), "run `make openapi`"
    assert OPENAPI_FILE.read_text(encoding="utf-8") == openapi_text(), (
        "openapi/openapi.json is out of date: run `make openapi`")


def test_database_errors_are_503_problems(settings: Settings) -> None:
    from sqlalchemy.exc import OperationalError

    app = create_app(settings)

    @app.get("/locked")
    def locked() -> None:
        raise OperationalError("UPDATE observations", {}, Exception("database is locked"))

    with TestClient(app, raise_server_exceptions=False) as client:
        response = client.get("/locked")
    assert_problem(response, 503, "service-unavailable")
    assert response.headers["retry-after"] == "5"
    assert "UPDATE" not in response.text


def test_cli_openapi_writes_and_checks(tmp_path: Path) -> None:
    from service.cli import main

    target = tmp_path / "openapi.json"
    assert main(["openapi", "--output", str(target)]) == 0
    assert json.loads(target.read_text())["info"]["title"] == "Inrush"
    assert main(["openapi", "--output", str(target), "--check"]) == 0
    target.write_text("{}")
    assert main(["openapi", "--output", str(target), "--check"]) == 1


def test_cli_serve_refuses_an_unusable_database_url() -> None:
    env = {**os.environ, "INRUSH_DATABASE_URL": "nosuchdialect://x"}
    result = subprocess.run([sys.executable, "-m", "service.cli", "serve", "--port", "1"],
                            env=env, capture_output=True, text=True, timeout=120, check=False)
    assert result.returncode == 1
    assert "INRUSH_DATABASE_URL" in result.stderr
    assert "Traceback" not in result.stderr
