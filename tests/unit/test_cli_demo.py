"""``inrush demo``'s printout: the uploads summarised as what they were, and no URL or token of
a server that ``--no-serve`` has already stopped."""

from __future__ import annotations

import argparse
from pathlib import Path
from typing import Any

import pytest

from service.cli import demo


def test_the_upload_log_reads_as_uploads_with_status_runs() -> None:
    statuses = [(f"2026-10-{day}", "healthy") for day in range(26, 29)] + \
        [("2026-10-29", "alert"), ("2026-10-30", "alert"), ("2026-10-31", "watch")]
    assert demo._status_runs(statuses) == [
        "healthy after the uploads of 2026-10-26 to 2026-10-28",
        "alert after the uploads of 2026-10-29 to 2026-10-30",
        "watch after the upload of 2026-10-31"]


class _FakeServer:
    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self.stopped = False

    def poll(self) -> int | None:
        return 0 if self.stopped else None

    def terminate(self) -> None:
        self.stopped = True

    def wait(self, timeout: float | None = None) -> int:
        self.stopped = True
        return 0


@pytest.mark.parametrize("no_serve", [True, False])
def test_urls_and_token_only_while_the_server_runs(monkeypatch: pytest.MonkeyPatch,
                                                   tmp_path: Path, no_serve: bool,
                                                   capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setattr(demo.subprocess, "Popen", _FakeServer)
    monkeypatch.setattr(demo, "_wait_healthy", lambda client, server: True)
    monkeypatch.setattr(demo, "_upload", lambda client: print("uploaded"))
    monkeypatch.setattr(demo, "_show", lambda client: print("report"))
    args = argparse.Namespace(port=0, database=tmp_path / "demo.db", no_serve=no_serve,
                              offline=False, pull=False)
    assert demo.run_demo(args) == 0
    out = capsys.readouterr().out
    assert "uploaded" in out and "report" in out
    if no_serve:
        assert "has stopped" in out
        assert "http://" not in out and "token" not in out.lower()
    else:
        assert "http://127.0.0.1:" in out and "Demo admin token: " in out
        assert "Serving until Ctrl-C." in out
