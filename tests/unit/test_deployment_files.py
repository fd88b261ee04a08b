"""docker/Dockerfile and docker/compose.yaml stay in line with the CLI and the settings, and a
replica started without migrations refuses an outdated schema instead of serving it."""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from service.cli import build_parser
from service.cors import CorsSettings
from service.metrics import MetricsSettings
from service.notify.settings import NotifySettings
from service.settings import Settings

DOCKER = Path(__file__).resolve().parents[2] / "docker"
SETTINGS = (Settings, NotifySettings, CorsSettings, MetricsSettings)


def _known_variables() -> set[str]:
    return {f"INRUSH_{name.upper()}" for model in SETTINGS for name in model.model_fields}


def _compose() -> dict:  # type: ignore[type-arg]
    return yaml.safe_load((DOCKER / "compose.yaml").read_text(encoding="utf-8"))


def test_compose_commands_parse_with_the_cli() -> None:
    parser = build_parser()
    commands = [s["command"] for s in _compose()["services"].values() if "command" in s]
    assert commands
    for command in commands:
        if command[0] != "inrush":
            continue
        parser.parse_args(command[1:])  # exits (fails the test) on an unknown option


def test_compose_and_dockerfile_set_only_known_settings() -> None:
    known = _known_variables()
    compose = _compose()
    named = {key for service in compose["services"].values()
             for key in (service.get("environment") or {}) if key.startswith("INRUSH_")}
    dockerfile = (DOCKER / "Dockerfile").read_text(encoding="utf-8")
    named |= set(re.findall(r"\b(INRUSH_[A-Z_]+)=", dockerfile))
    # Documented in the comments as well: every INRUSH_ name there must exist too.
    named |= set(re.findall(r"\b(INRUSH_[A-Z_]+)\b", (DOCKER / "compose.yaml").read_text()))
    named.discard("INRUSH_DB_PASSWORD")  # compose's own variable for the database password
    assert named and named <= known, sorted(named - known)


def test_dockerfile_runs_the_service_unprivileged_with_a_health_check() -> None:
    text = (DOCKER / "Dockerfile").read_text(encoding="utf-8")
    users = re.findall(r"^USER\s+(\S+)", text, flags=re.MULTILINE)
    assert users and users[-1] not in ("root", "0")
    [health] = re.findall(r"^HEALTHCHECK .*?CMD (.*)$", text, flags=re.MULTILINE | re.DOTALL)
    assert "/healthz" in health
    [command] = re.findall(r"^CMD (\[.*\])$", text, flags=re.MULTILINE)
    argv = yaml.safe_load(command)
    assert argv[0] == "inrush"
    build_parser().parse_args(argv[1:])
    # The same install as `make install`: the project with the postgres extra, into a venv.
    makefile = (DOCKER.parent / "Makefile").read_text(encoding="utf-8")
    assert "pip install --quiet -e '.[dev,postgres]'" in makefile
    assert "pip install --quiet '.[postgres]'" in text and "python -m venv" in text


def test_serve_without_migrations_refuses_an_outdated_schema(tmp_path: Path) -> None:
    env = {**os.environ, "INRUSH_DATABASE_URL": f"sqlite:///{tmp_path / 'empty.db'}",
           "INRUSH_MIGRATE_ON_START": "false"}
    env.pop("PROMETHEUS_MULTIPROC_DIR", None)
    try:
        done = subprocess.run([sys.executable, "-m", "service.cli", "serve", "--port", "9"],
                              env=env, capture_output=True, text=True, timeout=60)
    except subprocess.TimeoutExpired:
        pytest.fail("inrush serve started on a database without the schema")
    assert done.returncode == 1
    assert "run `inrush db upgrade` first" in done.stderr, done.stderr
