"""Access control, secrets and request hygiene.

* Every operation of the OpenAPI document is walked: reads need a read token, writes a write
  token, token management admin; without a token 401 (with an RFC 6750 challenge), with too
  little scope 403, and a new operation must be classified here before this test passes.
* Tokens are stored as SHA-256 hashes only and compared with ``hmac.compare_digest``; a revoked
  token stops working on the next request (API and status pages).
* Webhook secrets and tokens never appear in answers (beyond the one answer that mints a
  token) nor in logs, error paths included; status-page ``?token=`` is redacted in the access
  log.
* Bodies over the size limit and uploads over the row limit are refused with 413.
* Every answer carries ``X-Request-ID`` (the caller's, or a generated one) and the access log
  is JSON lines carrying it, in process and from a live ``inrush serve``.
"""

from __future__ import annotations

import hashlib
import inspect
import io
import json
import logging
import re
import sqlite3
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest
from fastapi.testclient import TestClient

from service import metrics, tokens
from service.access_log import ACCESS_LOGGER, JsonFormatter
from service.app import create_app
from service.settings import Settings
from tests.reliability.conftest import ADMIN_TOKEN, MAX_BODY_BYTES, MAX_ROWS, Seeded
from tests.reliability.support import EXPERIMENT, LiveServer, batch_rows, dump_database

PUBLIC = {("GET", "/healthz"), ("GET", "/metrics"), ("GET", "/problems/{slug}")}
READ_POSTS = {("POST", "/v1/experiments/{experiment_id}/reweight")}  # computes, stores nothing
# A pull config names files and databases the server itself reads: setting it is for admins.
ADMIN_WRITES = {("PUT", "/v1/experiments/{experiment_id}/pull"),
                ("DELETE", "/v1/experiments/{experiment_id}/pull")}


def required_scope(method: str, path: str) -> str | None:
    """The scope an operation needs by the access rules (None: public)."""
    if (method, path) in PUBLIC:
        return None
    if path.startswith("/v1/tokens") or (method, path) in ADMIN_WRITES:
        return "admin"
    if method == "GET" or (method, path) in READ_POSTS:
        return "read"
    return "write"


def operations(app: Any) -> list[tuple[str, str, dict[str, Any]]]:
    return [(method.upper(), path, operation)
            for path, item in app.openapi()["paths"].items()
            for method, operation in item.items()]


def concrete(path: str, alert_id: int) -> str:
    return (path.replace("{experiment_id}", EXPERIMENT["id"])
            .replace("{alert_id}", str(alert_id)).replace("{ident}", "no-such-token")
            .replace("{slug}", "not-found"))


def bearer(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def mint(client: TestClient, scope: str, name: str) -> str:
    answer = client.post("/v1/tokens", json={"scope": scope, "name": name})
    assert answer.status_code == 201, answer.text
    return str(answer.json()["token"])


@pytest.fixture(scope="module")
def scoped(seeded: Seeded) -> dict[str, str]:
    return {scope: mint(seeded.client, scope, f"walk-{scope}")
            for scope in ("read", "write", "admin")}


def test_every_operation_needs_its_scope(seeded: Seeded, scoped: dict[str, str]) -> None:
    anonymous = seeded.client
    alert_id = seeded.alert_ids[0]
    walked = 0
    for method, path, operation in operations(seeded.app):
        need = required_scope(method, path)
        url = concrete(path, alert_id)
        secured = bool(operation.get("security"))
        assert secured == (need is not None), (method, path, "documented security")
        if need is None:
            answer = anonymous.request(method, url, headers={"Authorization": ""})
            assert answer.status_code not in (401, 403), (method, path)
            continue
        before = dump_database(seeded.engine)
        answer = anonymous.request(method, url, json={}, headers={"Authorization": ""})
        assert answer.status_code == 401, (method, path, answer.text)
        assert answer.headers["www-authenticate"].startswith("Bearer")
        assert answer.headers["content-type"].startswith("application/problem+json")
        answer = anonymous.request(method, url, json={},
                                   headers=bearer("inr_" + "x" * 43))
        assert answer.status_code == 401, (method, path)
        below = {"read": None, "write": "read", "admin": "write"}[need]
        if below is not None:
            answer = anonymous.request(method, url, json={}, headers=bearer(scoped[below]))
            assert answer.status_code == 403, (method, path, answer.text)
            assert f'scope="{need}"' in answer.headers["www-authenticate"]
        assert dump_database(seeded.engine) == before, (method, path, "refused but wrote")
        # With the scope it needs, the request gets past authentication.
        ok = anonymous.request(method, url, json={}, headers=bearer(scoped[need]))
        assert ok.status_code not in (401, 403), (method, path, ok.text)
        walked += 1
    assert walked >= 20


def test_status_pages_need_a_read_token(seeded: Seeded, scoped: dict[str, str]) -> None:
    for path in ("/experiments", f"/experiments/{EXPERIMENT['id']}"):
        assert seeded.client.get(path, headers={"Authorization": ""}).status_code == 401
        assert seeded.client.get(path, headers=bearer(scoped["read"])).status_code == 200


def test_tokens_are_stored_hashed_and_compared_in_constant_time(seeded: Seeded) -> None:
    plain = mint(seeded.client, "write", "hash-check")
    dump = json.dumps(dump_database(seeded.engine), default=str)
    assert plain not in dump and ADMIN_TOKEN not in dump
    assert hashlib.sha256(plain.encode()).hexdigest() in dump
    # The functions that compare a presented token (or its hash) with a known one.
    for function in (tokens.bootstrap_principal, tokens.stored_principal, metrics.metrics):
        source = inspect.getsource(function)
        assert "hmac.compare_digest" in source, function.__qualname__
    # No plain == / != on a presented secret anywhere in the token module.
    assert not re.search(r"(presented|admin_token)\s*[!=]=", inspect.getsource(tokens))


def test_revoked_token_stops_working_at_once(seeded: Seeded) -> None:
    plain = mint(seeded.client, "read", "short-lived")
    page = f"/experiments/{EXPERIMENT['id']}"
    assert seeded.client.get("/v1/experiments", headers=bearer(plain)).status_code == 200
    opened = seeded.client.get(page, params={"token": plain}, follow_redirects=False,
                               headers={"Authorization": ""})
    assert opened.status_code == 303
    cookie = opened.cookies.get("inrush_token")
    assert cookie == plain
    assert seeded.client.delete("/v1/tokens/short-lived").status_code == 200
    assert seeded.client.get("/v1/experiments", headers=bearer(plain)).status_code == 401
    again = seeded.client.get(page, headers={"Authorization": "",
                                             "Cookie": f"inrush_token={plain}"})
    assert again.status_code == 401


@pytest.fixture
def captured_logs() -> Iterator[io.StringIO]:
    """Everything the service's loggers write (DEBUG and up, as JSON lines with their
    fields) while the test runs; the test's own HTTP client library is left out."""
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonFormatter())
    handler.setLevel(logging.DEBUG)
    handler.addFilter(lambda record: not record.name.startswith(("httpx", "httpcore")))
    root, statements = logging.getLogger(), logging.getLogger("sqlalchemy.engine")
    previous = root.level, statements.level
    root.addHandler(handler)
    root.setLevel(logging.DEBUG)
    statements.setLevel(logging.INFO)  # SQL statements too: their parameters must be hidden
    try:
        yield stream
    finally:
        root.removeHandler(handler)
        root.setLevel(previous[0])
        statements.setLevel(previous[1])


def test_secrets_never_appear_in_answers_or_logs(tmp_path: Path,
                                                 captured_logs: io.StringIO) -> None:
    """Tokens and a webhook secret go through ordinary requests, failed ones (validation,
    wrong scope, a database locked past its busy timeout) and the status page's ?token=."""
    database = tmp_path / "inrush.db"
    secret = "whsec_" + "bGFya3NwdXItc2VjcmV0LWtleS1mb3ItdGVzdHM="
    other_secret = "trailhead-shared-secret-2"
    malformed = "whsec_??" + secret[6:]  # refused: its key is not base64
    app = create_app(Settings(database_url=f"sqlite:///{database}", admin_token=ADMIN_TOKEN,
                              sqlite_busy_timeout_ms=200))
    answers: list[httpx.Response] = []
    with TestClient(app, raise_server_exceptions=False) as client:
        client.headers["Authorization"] = f"Bearer {ADMIN_TOKEN}"
        minted = client.post("/v1/tokens", json={"scope": "read", "name": "reader"})
        reader = minted.json()["token"]
        writer = client.post("/v1/tokens", json={"scope": "write", "name": "writer"})
        writer_token = writer.json()["token"]
        notify = {"webhook_url": "https://93.184.215.14/hooks", "secret": secret}
        answers += [
            client.post("/v1/experiments", json={**EXPERIMENT, "notify": notify}),
            client.get(f"/v1/experiments/{EXPERIMENT['id']}"),
            client.get("/v1/experiments"),
            client.patch(f"/v1/experiments/{EXPERIMENT['id']}",
                         json={"notify": {"webhook_url": "https://93.184.215.14/other",
                                          "secret": other_secret}}),
            client.post("/v1/experiments", json={**EXPERIMENT, "id": "bad-secret",
                                                 "notify": {**notify, "secret": malformed}}),
            client.put(f"/v1/experiments/{EXPERIMENT['id']}/observations",
                       json={"rows": batch_rows("organic")}, headers=bearer(writer_token)),
            client.get("/v1/tokens"),
            client.post("/v1/tokens", json={"scope": "admin"}, headers=bearer(reader)),
            client.get("/v1/experiments", headers=bearer(reader + "x")),
            client.get(f"/experiments/{EXPERIMENT['id']}", params={"token": reader},
                       headers={"Authorization": ""}, follow_redirects=False),
        ]
        blocker = sqlite3.connect(database, isolation_level=None, timeout=0)
        blocker.execute("BEGIN EXCLUSIVE")
        try:
            locked = client.post("/v1/experiments", json={**EXPERIMENT, "id": "locked-out",
                                                          "notify": notify})
        finally:
            blocker.execute("ROLLBACK")
            blocker.close()
        assert locked.status_code == 503
        answers.append(locked)
        for alert in client.get("/v1/alerts").json()["items"]:
            answers.append(client.get(f"/v1/alerts/{alert['id']}/deliveries"))
    assert answers[4].status_code == 422
    assert answers[7].status_code == 403 and answers[8].status_code == 401
    shown = [minted, writer]  # the only answers that may show a token: the ones minting it
    for answer in answers:
        # The status page keeps the reader's own token in an HttpOnly, SameSite=Strict cookie
        # (that is how it signs in); no other header or body may carry a credential.
        headers = {k: v for k, v in answer.headers.items()
                   if not (k == "set-cookie" and v.startswith(f"inrush_token={reader};"))}
        text = answer.text + json.dumps(headers)
        for value in (secret, other_secret, malformed, reader, writer_token, ADMIN_TOKEN):
            assert value not in text, (answer.request.method, answer.request.url, value[:6])
    assert all(answer.json()["token"] for answer in shown)
    logs = captured_logs.getvalue()
    # The logs were captured, SQL statements included.
    assert "database unavailable" in logs and ACCESS_LOGGER in logs and "INSERT INTO" in logs
    for value in (secret, other_secret, reader, writer_token, ADMIN_TOKEN, secret[6:]):
        assert value not in logs, value[:6]
    assert "token=%5Bredacted%5D" in logs


def test_body_and_row_limits_answer_413(seeded: Seeded) -> None:
    url = f"/v1/experiments/{EXPERIMENT['id']}/observations"
    before = dump_database(seeded.engine)
    big = b'{"rows": [' + b" " * MAX_BODY_BYTES + b"]}"
    declared = seeded.client.put(url, content=big, headers={"Content-Type": "application/json"})

    def chunks() -> Iterator[bytes]:  # no Content-Length: the limit applies while streaming
        for start in range(0, len(big), 65536):
            yield big[start:start + 65536]

    streamed = seeded.client.put(url, content=chunks(),
                                 headers={"Content-Type": "application/json"})
    rows = [r for i in range(MAX_ROWS // 10 + 1) for r in batch_rows(f"s{i}")]
    too_many = seeded.client.put(url, json={"rows": rows})
    streamed_json = seeded.client.post("/v1/experiments", content=chunks(),
                                       headers={"Content-Type": "application/json"})
    for answer in (declared, streamed, too_many, streamed_json):
        assert answer.status_code == 413, answer.text[:300]
        assert answer.headers["content-type"].startswith("application/problem+json")
        assert answer.json()["type"].endswith("/problems/content-too-large")
    assert str(MAX_ROWS) in too_many.json()["detail"]
    assert dump_database(seeded.engine) == before


def test_request_ids_are_echoed_or_generated_and_logged_as_json(seeded: Seeded) -> None:
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonFormatter())
    access = logging.getLogger(ACCESS_LOGGER)
    access.addHandler(handler)
    previous = access.level
    access.setLevel(logging.INFO)
    try:
        given = seeded.client.get("/v1/experiments", headers={"X-Request-ID": "trail-42.a"})
        generated = seeded.client.get("/v1/alerts/987654")
        unsafe = seeded.client.get("/healthz", headers={"X-Request-ID": "x" * 200})
    finally:
        access.removeHandler(handler)
        access.setLevel(previous)
    assert given.headers["x-request-id"] == "trail-42.a"
    assert re.fullmatch(r"[0-9a-f]{32}", generated.headers["x-request-id"])
    assert re.fullmatch(r"[0-9a-f]{32}", unsafe.headers["x-request-id"])
    lines = [json.loads(line) for line in stream.getvalue().splitlines()]
    by_id = {line["request_id"]: line for line in lines}
    first = by_id["trail-42.a"]
    assert (first["method"], first["path"], first["status"]) == ("GET", "/v1/experiments", 200)
    assert first["route"] == "/v1/experiments" and first["principal"] == "bootstrap-admin"
    assert first["duration_ms"] >= 0 and first["bytes"] > 0
    assert by_id[generated.headers["x-request-id"]]["status"] == 404
    assert by_id[unsafe.headers["x-request-id"]]["path"] == "/healthz"


@pytest.mark.slow
def test_live_server_writes_json_access_lines_without_credentials(tmp_path: Path) -> None:
    server = LiveServer(f"sqlite:///{tmp_path / 'inrush.db'}", tmp_path / "server.log").start()
    try:
        with server.client() as client:
            reader = client.post("/v1/tokens", json={"scope": "read"}).json()["token"]
            client.post("/v1/experiments", json=EXPERIMENT, headers={"X-Request-ID": "mk-1"})
            page = httpx.get(f"{server.base_url}/experiments", params={"token": reader},
                             follow_redirects=False, timeout=30)
            assert page.status_code == 303
    finally:
        server.stop()
    log = server.log_text()
    access = [json.loads(line) for line in log.splitlines()
              if line.startswith("{") and '"logger": "inrush.access"' in line]
    assert any(a["request_id"] == "mk-1" and a["status"] == 201 for a in access), log[-2000:]
    assert any(a["path"] == "/experiments" and a["query"] == "token=%5Bredacted%5D"
               for a in access)
    for value in (reader, server.admin_token):
        assert value not in log
    assert '"GET /healthz HTTP/1.1"' not in log  # uvicorn's text access log is off
