"""A webhook receiver on 127.0.0.1 for the notification tests (imported as a top-level module)."""

from __future__ import annotations

import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer


@dataclass
class Received:
    path: str
    headers: dict[str, str]
    body: bytes


@dataclass
class Receiver:
    """Answers each POST with the next planned status (then ``default``); keeps every request."""

    url: str
    planned: list[int] = field(default_factory=list)
    default: int = 200
    requests: list[Received] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)

    def next_status(self) -> int:
        with self.lock:
            return self.planned.pop(0) if self.planned else self.default


@contextmanager
def running_receiver(planned: list[int] | None = None, default: int = 200
                     ) -> Iterator[Receiver]:
    receiver: Receiver

    class Handler(BaseHTTPRequestHandler):
        def do_POST(self) -> None:
            body = self.rfile.read(int(self.headers.get("content-length", "0")))
            with receiver.lock:
                receiver.requests.append(Received(self.path, {k.lower(): v for k, v in
                                                              self.headers.items()}, body))
            status = receiver.next_status()
            self.send_response(status)
            if 300 <= status < 400:
                self.send_header("Location", f"{receiver.url}/moved")
            payload = b'{"received":true}' if status < 300 else b"trail closed"
            self.send_header("Content-Length", str(len(payload)))
            self.end_headers()
            self.wfile.write(payload)

        def log_message(self, *args: object) -> None:
            pass

    server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    receiver = Receiver(url=f"http://127.0.0.1:{server.server_address[1]}",
                        planned=list(planned or []), default=default)
    thread = threading.Thread(target=server.serve_forever, daemon=True)
    thread.start()
    try:
        yield receiver
    finally:
        server.shutdown()
        server.server_close()
        thread.join(5)
