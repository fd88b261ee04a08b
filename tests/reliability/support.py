"""Helpers shared by the reliability tests and ``benchmarks/reliability_report.py``.

Imported as ``tests.reliability.support`` (the repository root is on ``sys.path``: pytest's
``pythonpath`` setting, or ``python -m`` from the root).
"""

from __future__ import annotations

import contextlib
import datetime as dt
import json
import os
import secrets
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
from sqlalchemy import Engine, select

from service.db import load_models
from tests.backends import (  # noqa: F401  (re-exported for the reliability tests)
    POSTGRES_URL,
    libpq,
    postgres_database,
    postgres_problem,
    wanted_backends,
)

ROOT = Path(__file__).resolve().parents[2]
DEMO_CSV = ROOT / "service" / "demo" / "larkspur_route_cards.csv"
STATS_ENV = "INRUSH_RELIABILITY_STATS"

# The demo scenario's experiment (Larkspur Trails, an invented hiking-route app).
EXPERIMENT: dict[str, Any] = {
    "id": "route-cards",
    "title": "Route cards on the trail list",
    "start_date": "2026-10-26",
    "arms": ["control", "cards"],
    "allocation": [{"from": "2026-10-26", "weights": [0.5, 0.5]}],
}
SOURCES = ("organic", "newsletter", "push", "paid_search")


# -- backends ----------------------------------------------------------------------------------


# -- database dumps ----------------------------------------------------------------------------


def dump_database(engine: Engine) -> dict[str, list[tuple[Any, ...]]]:
    """Every row of every table, ordered by primary key: equal dumps mean nothing changed."""
    dump: dict[str, list[tuple[Any, ...]]] = {}
    with engine.connect() as connection:
        for table in load_models().sorted_tables:
            order = list(table.primary_key.columns) or list(table.columns)
            rows = connection.execute(select(table).order_by(*order)).all()
            dump[table.name] = [tuple(_comparable(v) for v in row) for row in rows]
    return dump


def _comparable(value: Any) -> Any:
    if isinstance(value, dict | list):
        return json.dumps(value, sort_keys=True, default=str)
    return value


# -- live servers ------------------------------------------------------------------------------


def free_port() -> int:
    with contextlib.closing(socket.socket(socket.AF_INET, socket.SOCK_STREAM)) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@dataclass
class LiveServer:
    """An ``inrush serve`` process on a loopback port (one worker: the process is the server)."""

    database_url: str
    log_path: Path
    env: dict[str, str] = field(default_factory=dict)
    admin_token: str = field(default_factory=lambda: "rel-admin-" + secrets.token_hex(12))
    port: int = field(default_factory=free_port)
    process: subprocess.Popen[bytes] | None = None

    @property
    def base_url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    @property
    def headers(self) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.admin_token}"}

    def start(self, timeout: float = 60.0) -> LiveServer:
        environment = {**os.environ, "INRUSH_DATABASE_URL": self.database_url,
                       "INRUSH_ADMIN_TOKEN": self.admin_token, "INRUSH_PUBLIC_URL": self.base_url,
                       "INRUSH_NOTIFY_WORKER": "0", **self.env}
        environment.pop("PROMETHEUS_MULTIPROC_DIR", None)
        log = self.log_path.open("ab")
        self.process = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--host", "127.0.0.1", "--port",
             str(self.port), "--workers", "1"], env=environment, stdout=log,
            stderr=subprocess.STDOUT, cwd=ROOT)
        log.close()
        deadline = time.monotonic() + timeout
        while True:
            if self.process.poll() is not None:
                raise RuntimeError("server exited:\n" + self.log_text())
            with contextlib.suppress(httpx.HTTPError):
                if httpx.get(f"{self.base_url}/healthz", timeout=2).status_code == 200:
                    return self
            if time.monotonic() > deadline:
                self.kill()
                raise RuntimeError("server did not become healthy:\n" + self.log_text())
            time.sleep(0.1)

    def kill(self) -> None:
        """SIGKILL: no shutdown handler, no flush, no goodbye."""
        if self.process is not None and self.process.poll() is None:
            os.kill(self.process.pid, signal.SIGKILL)
            self.process.wait(10)

    def stop(self) -> None:
        if self.process is not None and self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(20)
            except subprocess.TimeoutExpired:
                self.kill()

    def log_text(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path.exists() else ""

    def client(self, timeout: float = 60.0) -> httpx.Client:
        return httpx.Client(base_url=self.base_url, headers=self.headers, timeout=timeout)


@contextlib.contextmanager
def live_server(database_url: str, log_path: Path, env: dict[str, str] | None = None
                ) -> Iterator[LiveServer]:
    server = LiveServer(database_url, log_path, env=dict(env or {})).start()
    try:
        yield server
    finally:
        server.stop()


# -- data --------------------------------------------------------------------------------------


def batch_rows(tag: str, days: int = 5, start: dt.date = dt.date(2026, 10, 26),
               base: int = 100) -> list[dict[str, Any]]:
    """A distinctive batch: the rows of source ``tag`` over ``days`` days and both arms.

    Counts encode the tag's hash so that a row from another batch cannot pass for this one.
    """
    seed = sum(tag.encode()) % 50
    rows = []
    for day in range(days):
        for position, arm in enumerate(("control", "cards")):
            entered = base + seed + 3 * day + position
            rows.append({"date": (start + dt.timedelta(days=day)).isoformat(), "arm": arm,
                         "source": tag, "entered": entered,
                         "metrics": {"routes_saved": {"n": entered, "sum": float(entered),
                                                      "sum_sq": float(2 * entered)}}})
    return rows


def rows_by_source(rows: list[dict[str, Any]]) -> dict[str, list[tuple[Any, ...]]]:
    grouped: dict[str, list[tuple[Any, ...]]] = {}
    for row in rows:
        grouped.setdefault(row["source"], []).append(
            (row["date"], row["arm"], row["entered"], json.dumps(row.get("metrics") or {},
                                                                 sort_keys=True)))
    return {source: sorted(items) for source, items in grouped.items()}


def expected_batch(tag: str, days: int = 5) -> list[tuple[Any, ...]]:
    return rows_by_source(batch_rows(tag, days))[tag]


# -- figures for benchmarks/reliability_report.py ----------------------------------------------


def record(name: str, value: Any) -> None:
    """Append a figure to the file named by INRUSH_RELIABILITY_STATS (no-op when unset)."""
    target = os.environ.get(STATS_ENV)
    if not target:
        return
    with open(target, "a", encoding="utf-8") as handle:
        handle.write(json.dumps({"name": name, "value": value}, default=str) + "\n")


# -- a webhook receiver that misbehaves on demand ---------------------------------------------


@dataclass
class Received:
    event_id: str
    status: int
    at: float


class FaultyReceiver:
    """A webhook receiver on 127.0.0.1 whose behaviour the test switches.

    ``mode``: ``"ok"`` answers 200, ``"error"`` answers 500, ``"slow"`` waits ``delay`` seconds
    before answering 200 (longer than the sender's timeout). ``start()`` may be called late on a
    port chosen up front, so that the receiver is down (connection refused) until then.
    """

    def __init__(self, port: int | None = None, mode: str = "ok", delay: float = 2.0) -> None:
        import threading

        self.port = port or free_port()
        self.mode = mode
        self.delay = delay
        self.received: list[Received] = []
        self.lock = threading.Lock()
        self._server: Any = None
        self._thread: Any = None

    @property
    def url(self) -> str:
        return f"http://127.0.0.1:{self.port}/hooks/inrush"

    def start(self) -> FaultyReceiver:
        import threading
        from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer

        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                self.rfile.read(int(self.headers.get("content-length", "0")))
                mode = receiver.mode
                status = 500 if mode == "error" else 200
                if mode == "slow":
                    time.sleep(receiver.delay)
                with receiver.lock:
                    receiver.received.append(Received(self.headers.get("webhook-id", ""),
                                                      status, time.monotonic()))
                payload = b'{"ok":true}' if status == 200 else b"trailhead closed"
                try:
                    self.send_response(status)
                    self.send_header("Content-Length", str(len(payload)))
                    self.end_headers()
                    self.wfile.write(payload)
                except OSError:  # the sender gave up waiting (slow mode)
                    pass

            def log_message(self, *args: object) -> None:
                pass

        class Server(ThreadingHTTPServer):
            allow_reuse_address = True
            daemon_threads = True

            def handle_error(self, request: Any, client_address: Any) -> None:
                pass

        self._server = Server(("127.0.0.1", self.port), Handler)
        self._thread = threading.Thread(target=self._server.serve_forever, daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._thread.join(5)
            self._server = None

    def delivered_ids(self) -> set[str]:
        with self.lock:
            return {r.event_id for r in self.received if r.status == 200}


def wait_for(condition: Any, timeout: float, interval: float = 0.05, what: str = "") -> Any:
    """Poll ``condition()`` until it returns something truthy; fail after ``timeout``."""
    deadline = time.monotonic() + timeout
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > deadline:
            raise AssertionError(f"timed out after {timeout:g} s waiting for {what or condition}")
        time.sleep(interval)
