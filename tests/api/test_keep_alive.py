"""An unexpected error answers 500 and leaves the keep-alive connection usable (a live
`inrush serve`, spoken to over one raw socket)."""

from __future__ import annotations

import secrets
import socket
import sqlite3
from pathlib import Path

import httpx
import pytest
from apihelpers import EXPERIMENT
from inrush_process import inrush_serve

pytestmark = pytest.mark.slow


def _read_response(stream: socket.socket) -> tuple[int, dict[str, str], bytes]:
    """One HTTP/1.1 response with a Content-Length body, read off the socket."""
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = stream.recv(65536)
        if not chunk:
            raise ConnectionError(f"the server closed the connection; read so far: {data!r}")
        data += chunk
    head, _, body = data.partition(b"\r\n\r\n")
    status_line, *lines = head.decode("latin-1").split("\r\n")
    headers = {k.strip().lower(): v.strip() for k, v in (line.split(":", 1) for line in lines)}
    length = int(headers["content-length"])
    while len(body) < length:
        chunk = stream.recv(65536)
        if not chunk:
            raise ConnectionError("the server closed the connection inside a body")
        body += chunk
    return int(status_line.split()[1]), headers, body


@pytest.mark.timeout(120)
def test_a_500_keeps_the_connection_usable(tmp_path: Path) -> None:
    token = secrets.token_urlsafe(32)
    with inrush_serve(tmp_path, token=token, clean_log=False) as (base, _):
        auth = {"Authorization": f"Bearer {token}"}
        assert httpx.post(f"{base}/v1/experiments", json=EXPERIMENT,
                          headers=auth).status_code == 201
        # A stored schedule no code path expects: reading the experiment fails unexpectedly.
        with sqlite3.connect(tmp_path / "inrush.db") as database:
            database.execute("UPDATE experiments SET allocation = '\"not a schedule\"'")
        host, port = base.removeprefix("http://").split(":")
        with socket.create_connection((host, int(port)), timeout=30) as stream:
            stream.sendall(f"GET /v1/experiments/route-cards HTTP/1.1\r\nHost: {host}\r\n"
                           f"Authorization: Bearer {token}\r\n\r\n".encode())
            status, headers, body = _read_response(stream)
            assert status == 500
            assert headers["content-type"] == "application/problem+json"
            assert b"internal-error" in body
            assert headers.get("connection") != "close"
            # The same connection answers the next request.
            stream.sendall(f"GET /healthz HTTP/1.1\r\nHost: {host}\r\n\r\n".encode())
            status, _, body = _read_response(stream)
            assert status == 200, body
