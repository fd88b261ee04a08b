"""The poll fast path (service.revalidation): its 304s equal the routes' own, everything else
reaches the routes, and the access log and metrics see its answers like any other."""

from __future__ import annotations

import asyncio
import json
import logging
from collections.abc import Callable
from typing import Any

import pytest
from apihelpers import EXPERIMENT, assert_problem, corrected_demo_csv, demo_csv_text, upload_csv
from fastapi import FastAPI
from prometheus_client.parser import text_string_to_metric_families

from service.revalidation import current_tag as _current_tag
from service.tokens import revoke_token

BASE = "/v1/experiments/route-cards"
ROUTE = "/v1/experiments/{experiment_id}/diagnosis"
HEADERS_OF_304 = ("etag", "cache-control", "x-inrush-diagnosis-version")


def current_tag(database: Any, *arguments: str) -> Any:
    """The fast path's decision, made in a loop of its own (and its PostgreSQL connections
    closed in it, so that the application's loop opens its own)."""
    async def decide() -> Any:
        try:
            return await _current_tag(database, *arguments)
        finally:
            if database.async_reads is not None:
                await database.async_reads.close()

    return asyncio.run(decide())


@pytest.fixture
def polled(client: Any) -> dict[str, str]:
    """The demo experiment, uploaded, and the current tags of its two polled documents."""
    client.post("/v1/experiments", json=EXPERIMENT)
    upload_csv(client, demo_csv_text())
    return {name: client.get(f"{BASE}/{name}").headers["etag"]
            for name in ("diagnosis", "series")}


@pytest.mark.parametrize("document", ["diagnosis", "series"])
def test_current_tag_gets_the_same_304_as_the_route(client: Any, anonymous: Any,
                                                    token_for: Callable[[str], str],
                                                    polled: dict[str, str],
                                                    document: str) -> None:
    reader = token_for("read")
    admin = anonymous.headers.pop("Authorization")
    tag = polled[document]
    fast = anonymous.get(f"{BASE}/{document}", headers={
        "Authorization": f"Bearer {reader}", "If-None-Match": tag})
    assert fast.status_code == 304 and fast.content == b""
    # A query string skips the fast path: the route itself answers the same tag.
    version = fast.headers["x-inrush-diagnosis-version"]
    routed = (client.get(f"{BASE}/diagnosis?version={version}",
                         headers={"If-None-Match": tag, "Authorization": admin})
              if document == "diagnosis" else None)
    if routed is not None:
        assert routed.status_code == 304
        assert {h: routed.headers[h] for h in HEADERS_OF_304} == {
            h: fast.headers[h] for h in HEADERS_OF_304}
    assert fast.headers["etag"] == tag


def test_tag_lists_and_weak_tags_match_as_on_the_route(client: Any,
                                                       polled: dict[str, str]) -> None:
    tag = polled["diagnosis"]
    listed = client.get(f"{BASE}/diagnosis", headers={"If-None-Match": f'"other", W/{tag}'})
    assert listed.status_code == 304
    star = client.get(f"{BASE}/diagnosis", headers={"If-None-Match": "*"})
    assert star.status_code == 304


def test_stale_tag_gets_the_new_document(client: Any, polled: dict[str, str]) -> None:
    upload_csv(client, corrected_demo_csv())
    fresh = client.get(f"{BASE}/diagnosis", headers={"If-None-Match": polled["diagnosis"]})
    assert fresh.status_code == 200
    assert fresh.headers["etag"] != polled["diagnosis"]
    assert fresh.json()["experiment"] == "route-cards"


@pytest.mark.parametrize("authorization", [None, "Bearer not-a-token", "Basic abc", "Bearer "])
def test_without_a_valid_token_the_route_refuses(anonymous: Any, polled: dict[str, str],
                                                 authorization: str | None) -> None:
    anonymous.headers.pop("Authorization", None)  # the same client as ``client``
    headers = {"If-None-Match": polled["diagnosis"]}
    if authorization is not None:
        headers["Authorization"] = authorization
    refused = anonymous.get(f"{BASE}/diagnosis", headers=headers)
    assert_problem(refused, 401)
    assert "www-authenticate" in refused.headers


def test_a_revoked_token_gets_no_304(app: FastAPI, anonymous: Any,
                                     token_for: Callable[[str], str],
                                     polled: dict[str, str]) -> None:
    reader = token_for("read", "wall-screen")
    anonymous.headers.pop("Authorization", None)
    headers = {"Authorization": f"Bearer {reader}", "If-None-Match": polled["diagnosis"]}
    assert anonymous.get(f"{BASE}/diagnosis", headers=headers).status_code == 304
    with app.state.database.sessions.begin() as session:
        revoke_token(session, "wall-screen")
    assert_problem(anonymous.get(f"{BASE}/diagnosis", headers=headers), 401)


def test_unknown_experiment_is_404_whatever_the_tag(client: Any,
                                                    polled: dict[str, str]) -> None:
    missing = client.get("/v1/experiments/no-such-test/diagnosis",
                         headers={"If-None-Match": polled["diagnosis"]})
    assert_problem(missing, 404)


def test_fast_answers_are_logged_and_counted_under_the_route(client: Any,
                                                             polled: dict[str, str],
                                                             caplog: pytest.LogCaptureFixture
                                                             ) -> None:
    def count_of_304s() -> float:
        text = client.get("/metrics").text
        for family in text_string_to_metric_families(text):
            for sample in family.samples:
                if (sample.name == "inrush_http_requests_total"
                        and sample.labels.get("route") == ROUTE
                        and sample.labels.get("status") == "304"):
                    return float(sample.value)
        return 0.0

    before = count_of_304s()
    with caplog.at_level(logging.INFO, logger="inrush.access"):
        answer = client.get(f"{BASE}/diagnosis", headers={"If-None-Match": polled["diagnosis"]})
    assert answer.status_code == 304
    records = [r for r in caplog.records if r.name == "inrush.access"]
    fields: dict[str, Any] = records[-1].fields  # type: ignore[attr-defined]
    assert fields["route"] == ROUTE
    assert fields["status"] == 304 and fields["principal"] == "bootstrap-admin"
    assert "x-request-id" in answer.headers
    assert count_of_304s() == before + 1
    json.dumps(fields)  # the access log writes it as JSON


def test_the_fast_path_itself_decides(app: FastAPI, client: Any, token_for: Callable[[str], str],
                                      polled: dict[str, str]) -> None:
    database, settings = app.state.database, app.state.settings
    admin = client.headers["Authorization"]
    tag = polled["series"]
    current = current_tag(database, settings, admin, "route-cards", "series", tag)
    assert current is not None and current.etag == tag and current.version >= 1
    assert current.principal == "bootstrap-admin"
    reader = current_tag(database, settings, f"bearer {token_for('read', 'kiosk')}",
                         "route-cards", "series", tag)
    assert reader is not None and reader.principal == "kiosk"
    # Each of these goes on to the route instead.
    assert current_tag(database, settings, admin, "route-cards", "diagnosis", tag) is None
    assert current_tag(database, settings, admin, "route-cards", "series", '"old"') is None
    assert current_tag(database, settings, admin, "elsewhere", "series", tag) is None
    assert current_tag(database, settings, "Bearer nope", "route-cards", "series", tag) is None
    assert current_tag(database, settings, "Token x", "route-cards", "series", tag) is None


def test_a_failing_quick_read_leaves_the_answer_to_the_route(app: FastAPI, client: Any,
                                                             polled: dict[str, str],
                                                             tmp_path: Any) -> None:
    """The fast path's own connections are not checked before use; when a read through them
    fails, the route answers (the same 304), never an error."""
    from sqlalchemy import create_engine

    from service.db.async_reads import AsyncReads

    database = app.state.database
    working = (database.quick_reads, database.async_reads)
    if database.async_reads is not None:  # nothing listens on port 9
        database.async_reads = AsyncReads("postgresql+psycopg://postgres@127.0.0.1:9/none", 1)
    else:
        database.quick_reads = create_engine(f"sqlite:///{tmp_path}/missing/folder/x.db")
    try:
        assert current_tag(database, app.state.settings, client.headers["Authorization"],
                           "route-cards", "diagnosis", polled["diagnosis"]) is None
        answer = client.get(f"{BASE}/diagnosis", headers={"If-None-Match": polled["diagnosis"]})
        assert answer.status_code == 304 and answer.headers["etag"] == polled["diagnosis"]
    finally:
        if database.quick_reads is not None and database.quick_reads is not working[0]:
            database.quick_reads.dispose()
        database.quick_reads, database.async_reads = working


def test_quick_read_connections_closed_by_the_server_are_replaced(app: FastAPI, client: Any,
                                                                  polled: dict[str, str]
                                                                  ) -> None:
    """PostgreSQL ends every session of the service (a restart, a failover): polls still get
    their 304, and the fast path serves them again afterwards."""
    database = app.state.database
    if database.async_reads is None:
        pytest.skip("SQLite connections are files: no server can close them")
    import psycopg

    from service.db.async_reads import QuickReadError

    reads, outcomes = database.async_reads, []
    fetch_one = reads.fetch_one

    async def watched(*arguments: Any) -> Any:
        try:
            row = await fetch_one(*arguments)
        except QuickReadError:
            outcomes.append("failed")
            raise
        outcomes.append("read")
        return row

    reads.fetch_one = watched
    headers = {"If-None-Match": polled["diagnosis"]}
    assert client.get(f"{BASE}/diagnosis", headers=headers).status_code == 304
    assert outcomes == ["read"]
    url = database.engine.url
    with psycopg.connect(host=url.host, port=url.port or 5432, user=url.username,
                         dbname="postgres", autocommit=True) as admin_connection:
        ended = admin_connection.execute(
            "SELECT count(pg_terminate_backend(pid)) FROM pg_stat_activity "
            "WHERE datname = %s AND pid <> pg_backend_pid()", (url.database,)).fetchone()
    assert ended is not None and ended[0] >= 1
    for _ in range(3):
        answer = client.get(f"{BASE}/diagnosis", headers=headers)
        assert answer.status_code == 304 and answer.headers["etag"] == polled["diagnosis"]
    # The closed connection failed one read (the route answered it), then a new one served.
    assert outcomes[1] == "failed" and outcomes[-1] == "read"


def test_on_a_sqlite_file_quick_reads_never_wait_for_a_lock(app: FastAPI, client: Any,
                                                            polled: dict[str, str]) -> None:
    """Polls on a SQLite file are answered on the event loop, so their reads must not wait:
    while another connection holds the file exclusively, the fast path gives up at once
    (the route then answers, waiting as long as the busy timeout allows)."""
    import sqlite3
    import time

    database = app.state.database
    if database.quick_reads is None:
        pytest.skip("only a SQLite file database reads through a connection of its own")
    settings, admin = app.state.settings, client.headers["Authorization"]
    # Only a connection that is alone on a WAL database can hold it exclusively.
    database.engine.dispose()
    database.quick_reads.dispose()
    holder = sqlite3.connect(database.engine.url.database, isolation_level=None)
    try:
        holder.execute("PRAGMA locking_mode=EXCLUSIVE")
        holder.execute("BEGIN EXCLUSIVE")
        holder.execute("UPDATE experiments SET title = title")
        started = time.monotonic()
        assert current_tag(database, settings, admin, "route-cards", "diagnosis",
                           polled["diagnosis"]) is None
        # A busy timeout would have waited 30 s; no wait at all is what inline reads need.
        assert time.monotonic() - started < 5
    finally:
        holder.execute("ROLLBACK")
        holder.close()
    assert current_tag(database, settings, admin, "route-cards", "diagnosis",
                       polled["diagnosis"]) is not None
