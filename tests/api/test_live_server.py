"""A real `inrush serve` process on a free loopback port, spoken to over HTTP."""

from __future__ import annotations

import contextlib
import os
import secrets
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import pandas as pd
import pytest
from apihelpers import DEMO_CSV, EXPERIMENT, demo_csv_text

pytestmark = pytest.mark.slow


def _free_port() -> int:
    with contextlib.closing(socket.socket(socket.AF_INET, socket.SOCK_STREAM)) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _command() -> list[str]:
    script = Path(sys.executable).with_name("inrush")
    return [str(script)] if script.exists() else [sys.executable, "-m", "service.cli"]


@pytest.fixture
def server(database_url: str, tmp_path: Path) -> Iterator[tuple[str, str]]:
    port, token = _free_port(), secrets.token_urlsafe(32)
    base = f"http://127.0.0.1:{port}"
    env = {**os.environ, "INRUSH_DATABASE_URL": database_url, "INRUSH_ADMIN_TOKEN": token,
           "INRUSH_PUBLIC_URL": base}
    log = (tmp_path / "server.log").open("wb")
    process = subprocess.Popen(
        [*_command(), "serve", "--host", "127.0.0.1", "--port", str(port), "--workers", "2"],
        env=env, stdout=log, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 60
        while True:
            if process.poll() is not None:
                pytest.fail("server exited:\n" + (tmp_path / "server.log").read_text())
            with contextlib.suppress(httpx.HTTPError):
                if httpx.get(f"{base}/healthz", timeout=2).status_code == 200:
                    break
            if time.monotonic() > deadline:
                pytest.fail("server did not become healthy:\n"
                            + (tmp_path / "server.log").read_text())
            time.sleep(0.2)
        yield base, token
    finally:
        process.terminate()
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait(timeout=10)
        log.close()


def test_serve_end_to_end_over_http(server: tuple[str, str]) -> None:
    base, token = server
    with httpx.Client(base_url=base, timeout=60,
                      headers={"Authorization": f"Bearer {token}"}) as client:
        assert client.get("/healthz").json() == {"status": "ok", "database": "ok"}
        assert httpx.get(f"{base}/v1/experiments", timeout=10).status_code == 401
        assert client.post("/v1/experiments", json=EXPERIMENT).status_code == 201
        written = client.put("/v1/experiments/route-cards/observations",
                             content=demo_csv_text().encode(),
                             headers={"Content-Type": "text/csv"})
        assert written.status_code == 200, written.text
        assert written.json()["diagnosis"]["url"] == \
            f"{base}/v1/experiments/route-cards/diagnosis"
        diagnosis = client.get("/v1/experiments/route-cards/diagnosis")
        assert diagnosis.json()["status"] == "alert"
        cached = client.get("/v1/experiments/route-cards/diagnosis",
                            headers={"If-None-Match": diagnosis.headers["etag"]})
        assert cached.status_code == 304
        assert client.get("/v1/alerts", params={"experiment": "route-cards"}).json()["items"]
        problem = client.put("/v1/experiments/route-cards/observations",
                             content=b"date,arm,source,entered\n2026-10-26,ctrl,organic,1\n",
                             headers={"Content-Type": "text/csv"})
        assert problem.status_code == 422
        assert problem.headers["content-type"].startswith("application/problem+json")
        assert problem.json()["type"].startswith(base)


def test_concurrent_writers_on_two_workers_lose_nothing(server: tuple[str, str]) -> None:
    base, token = server
    headers = {"Authorization": f"Bearer {token}"}
    httpx.post(f"{base}/v1/experiments", json=EXPERIMENT, headers=headers, timeout=30)
    frame = pd.read_csv(DEMO_CSV)
    days = [day.to_csv(index=False) for _, day in frame.groupby("date", sort=True)]

    def put(body: str) -> httpx.Response:
        return httpx.put(f"{base}/v1/experiments/route-cards/observations",
                         content=body.encode(), timeout=120,
                         headers={**headers, "Content-Type": "text/csv"})

    with ThreadPoolExecutor(max_workers=6) as pool:
        answers: list[Any] = list(pool.map(put, days))
    assert [a.status_code for a in answers] == [200] * len(days), [a.text for a in answers]
    stored = httpx.get(f"{base}/v1/experiments/route-cards/observations", headers=headers,
                       timeout=30).json()["rows"]
    assert len(stored) == len(frame)
    versions = httpx.get(f"{base}/v1/experiments/route-cards/diagnoses", headers=headers,
                         timeout=30).json()["items"]
    assert len({v["version"] for v in versions}) == len(versions)
    latest = httpx.get(f"{base}/v1/experiments/route-cards/diagnosis", headers=headers,
                       timeout=30).json()
    assert sum(latest["srm"]["observed"].values()) == int(frame["entered"].sum())
    alerts = httpx.get(f"{base}/v1/alerts", headers=headers, timeout=30).json()["items"]
    keys = [(a["kind"], a["key"]) for a in alerts]
    assert len(keys) == len(set(keys))
