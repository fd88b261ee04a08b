"""Settings checked at startup: the bootstrap admin token's length (named without its value),
and the CDN-backed API pages off unless asked for."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient
from pydantic import ValidationError

from service.app import create_app
from service.cli import main
from service.settings import MIN_ADMIN_TOKEN_CHARS, Settings, settings_problems


def test_a_short_admin_token_is_refused_without_repeating_it() -> None:
    with pytest.raises(ValidationError) as caught:
        Settings(admin_token="x" * (MIN_ADMIN_TOKEN_CHARS - 1))
    message = settings_problems(caught.value)
    assert f"INRUSH_ADMIN_TOKEN: must be at least {MIN_ADMIN_TOKEN_CHARS} characters" in message
    assert "xxx" not in message
    assert Settings(admin_token="x" * MIN_ADMIN_TOKEN_CHARS).admin_token is not None
    assert Settings(admin_token="").admin_token is None  # empty: unset


def test_serve_stops_at_start_with_a_clear_message(monkeypatch: pytest.MonkeyPatch,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("INRUSH_ADMIN_TOKEN", "trailhead")
    monkeypatch.setenv("INRUSH_DATABASE_URL", "sqlite://")
    assert main(["serve"]) == 1
    error = capsys.readouterr().err
    assert "INRUSH_ADMIN_TOKEN: must be at least 24 characters (it has 9)" in error
    assert "trailhead" not in error
    assert main(["token", "list"]) == 1
    assert "trailhead" not in capsys.readouterr().err


def test_api_pages_are_off_unless_enabled() -> None:
    for enabled, status in ((False, 404), (True, 200)):
        app = create_app(Settings(database_url="sqlite://", migrate_on_start=False,
                                  api_docs=enabled))
        with TestClient(app) as client:
            assert client.get("/docs").status_code == status
            assert client.get("/redoc").status_code == status
            assert client.get("/openapi.json").status_code == 200
