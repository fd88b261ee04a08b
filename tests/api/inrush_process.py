"""Run a real `inrush serve` on a free loopback port (imported as a top-level module)."""

from __future__ import annotations

import contextlib
import os
import secrets
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest


def free_port() -> int:
    with contextlib.closing(socket.socket(socket.AF_INET, socket.SOCK_STREAM)) as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@contextlib.contextmanager
def inrush_serve(tmp_path: Path, *, workers: int = 1, env: dict[str, str] | None = None,
                 database_url: str | None = None, token: str | None = None,
                 arguments: tuple[str, ...] = (), clean_log: bool = False
                 ) -> Iterator[tuple[str, str]]:
    """``(base_url, admin_token)`` of a running server (default: on a fresh SQLite database).

    ``arguments`` go to ``inrush serve``; with ``clean_log`` the test fails if the server's
    log shows a traceback once it has stopped.
    """
    port, token = free_port(), token or secrets.token_urlsafe(32)
    base = f"http://127.0.0.1:{port}"
    environment = {**os.environ,
                   "INRUSH_DATABASE_URL": database_url or f"sqlite:///{tmp_path / 'inrush.db'}",
                   "INRUSH_ADMIN_TOKEN": token, "INRUSH_PUBLIC_URL": base,
                   "INRUSH_NOTIFY_WORKER": "0", **(env or {})}
    environment.pop("PROMETHEUS_MULTIPROC_DIR", None)
    log_path = tmp_path / f"server-{port}.log"
    with log_path.open("wb") as log:
        process = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--host", "127.0.0.1", "--port",
             str(port), "--workers", str(workers), *arguments],
            env=environment, stdout=log, stderr=subprocess.STDOUT)
        try:
            deadline = time.monotonic() + 60
            while True:
                if process.poll() is not None:
                    pytest.fail("server exited:\n" + log_path.read_text())
                with contextlib.suppress(httpx.HTTPError):
                    if httpx.get(f"{base}/healthz", timeout=2).status_code == 200:
                        break
                if time.monotonic() > deadline:
                    pytest.fail("server did not start:\n" + log_path.read_text())
                time.sleep(0.2)
            yield base, token
        finally:
            process.terminate()
            try:
                process.wait(20)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(10)
    if clean_log:
        log_text = log_path.read_text()
        assert "Traceback" not in log_text, log_text[:4000]
