"""Bearer tokens, scopes (read < write < admin), 401/403 problems and token management."""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
from typing import Any

import pytest
from apihelpers import EXPERIMENT, assert_problem
from sqlalchemy import select

from service.db.models import ApiToken

READS = [("GET", "/v1/experiments"), ("GET", "/v1/experiments/route-cards"),
         ("GET", "/v1/experiments/route-cards/observations"),
         ("GET", "/v1/experiments/route-cards/diagnosis"),
         ("GET", "/v1/experiments/route-cards/series"),
         ("GET", "/v1/experiments/route-cards/diagnoses"),
         ("POST", "/v1/experiments/route-cards/reweight"), ("GET", "/v1/alerts"),
         ("GET", "/v1/alerts/1")]
WRITES = [("POST", "/v1/experiments"), ("PATCH", "/v1/experiments/route-cards"),
          ("PUT", "/v1/experiments/route-cards/observations"),
          ("POST", "/v1/alerts/1/acknowledge"), ("POST", "/v1/alerts/1/resolve")]
ADMINS = [("POST", "/v1/tokens"), ("GET", "/v1/tokens"), ("DELETE", "/v1/tokens/1")]


@pytest.mark.parametrize(("method", "path"), READS + WRITES + ADMINS)
def test_no_token_is_401_with_a_challenge(anonymous: Any, counts: Any, method: str,
                                          path: str) -> None:
    before = counts()
    response = anonymous.request(method, path, json={})
    assert_problem(response, 401, "unauthorized")
    assert response.headers["www-authenticate"].startswith("Bearer")
    assert counts() == before


def test_unknown_and_malformed_tokens_are_401(anonymous: Any) -> None:
    for header in ("Bearer not-a-token", "Basic dXNlcjpwdw==", "Bearer ", "bearer"):
        response = anonymous.get("/v1/experiments", headers={"Authorization": header})
        assert_problem(response, 401)
    response = anonymous.get("/v1/experiments", headers={"Authorization": "Bearer nope"})
    assert 'error="invalid_token"' in response.headers["www-authenticate"]


@pytest.mark.parametrize(("method", "path"), WRITES + ADMINS)
def test_read_token_cannot_write(anonymous: Any, token_for: Any, counts: Any, method: str,
                                 path: str) -> None:
    token = token_for("read", "dashboard")
    before = counts()
    response = anonymous.request(method, path, json={},
                                 headers={"Authorization": f"Bearer {token}"})
    body = assert_problem(response, 403, "forbidden")
    assert "dashboard" in body["detail"]
    assert 'error="insufficient_scope"' in response.headers["www-authenticate"]
    assert counts() == before


@pytest.mark.parametrize(("method", "path"), ADMINS)
def test_write_token_cannot_administer(anonymous: Any, token_for: Any, method: str,
                                       path: str) -> None:
    token = token_for("write")
    response = anonymous.request(method, path, json={"scope": "read"},
                                 headers={"Authorization": f"Bearer {token}"})
    assert_problem(response, 403)


def test_scopes_include_lower_ones(anonymous: Any, token_for: Any) -> None:
    write = {"Authorization": f"Bearer {token_for('write', 'loader')}"}
    read = {"Authorization": f"Bearer {token_for('read')}"}
    assert anonymous.post("/v1/experiments", json=EXPERIMENT, headers=write).status_code == 201
    assert anonymous.get("/v1/experiments/route-cards", headers=write).status_code == 200
    assert anonymous.get("/v1/experiments/route-cards", headers=read).status_code == 200


def test_tokens_are_stored_as_sha256_only(app: Any, client: Any) -> None:
    created = client.post("/v1/tokens", json={"scope": "write", "name": "nightly-export"})
    assert created.status_code == 201, created.text
    plain = created.json()["token"]
    with app.state.database.sessions() as session:
        stored = session.scalar(select(ApiToken).where(ApiToken.name == "nightly-export"))
        assert stored is not None
        assert stored.token_hash == hashlib.sha256(plain.encode()).hexdigest()
        assert plain not in str(vars(stored))
    listing = client.get("/v1/tokens").json()["items"]
    assert [t["name"] for t in listing] == ["nightly-export"]
    assert "token" not in listing[0]


def test_revoked_tokens_stop_working(anonymous: Any, client: Any) -> None:
    plain = client.post("/v1/tokens", json={"scope": "read", "name": "temp"}).json()["token"]
    headers = {"Authorization": f"Bearer {plain}"}
    assert anonymous.get("/v1/experiments", headers=headers).status_code == 200
    revoked = client.delete("/v1/tokens/temp")
    assert revoked.status_code == 200 and revoked.json()["revoked_at"] is not None
    assert_problem(anonymous.get("/v1/experiments", headers=headers), 401)
    assert_problem(client.delete("/v1/tokens/unknown"), 404)


def test_token_names_are_unique_and_checked(client: Any, counts: Any) -> None:
    client.post("/v1/tokens", json={"scope": "read", "name": "dup"})
    before = counts()
    assert_problem(client.post("/v1/tokens", json={"scope": "read", "name": "dup"}), 409)
    assert_problem(client.post("/v1/tokens", json={"scope": "read", "name": "bad name"}), 422)
    assert_problem(client.post("/v1/tokens", json={"scope": "root"}), 422)
    assert_problem(client.post("/v1/tokens", json={"scope": "read", "name": "inrush"}), 422)
    assert counts() == before


def _cli(database_url: str, *args: str) -> subprocess.CompletedProcess[str]:
    env = {**os.environ, "INRUSH_DATABASE_URL": database_url}
    return subprocess.run([sys.executable, "-m", "service.cli", *args], env=env,
                          capture_output=True, text=True, timeout=120, check=False)


def test_cli_token_create_list_revoke(anonymous: Any, database_url: str) -> None:
    created = _cli(database_url, "token", "create", "--scope", "write", "--name", "ci-loader")
    assert created.returncode == 0, created.stderr
    plain = created.stdout.strip()
    headers = {"Authorization": f"Bearer {plain}"}
    assert anonymous.post("/v1/experiments", json=EXPERIMENT, headers=headers).status_code == 201
    listed = _cli(database_url, "token", "list")
    assert "ci-loader" in listed.stdout and plain not in listed.stdout
    assert _cli(database_url, "token", "create", "--scope", "read", "--name", "ci-loader"
                ).returncode == 2
    assert _cli(database_url, "token", "revoke", "ci-loader").returncode == 0
    assert_problem(anonymous.get("/v1/experiments", headers=headers), 401)
    assert _cli(database_url, "token", "revoke", "no-such").returncode == 2
