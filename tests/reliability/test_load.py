"""A bounded load on a live ``inrush serve`` (loopback): concurrent writers and pollers.

Correctness only: every acknowledged write is stored exactly once and as sent, nothing
unacknowledged is stored, diagnosis versions are 1..n without gaps or repeats, the latest
diagnosis counts every stored unit, alerts are not duplicated, and pollers only ever see
200 or 304. Latency figures are recorded by ``benchmarks/reliability_report.py``, not asserted.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.reliability.loadgen import check_stored, prepare, run_load
from tests.reliability.support import LiveServer, record

pytestmark = pytest.mark.slow


def test_concurrent_writers_and_pollers_store_every_acknowledged_write_once(
        database_url: str, tmp_path: Path) -> None:
    server = LiveServer(database_url, tmp_path / "server.log").start()
    try:
        with server.client() as client:
            seeded = prepare(client)
            result = run_load(server.base_url, server.headers, seeded, writers=4,
                              writes_per_writer=5, pollers=3)
            assert not result.refused, result.refused
            writes = sum(n for (kind, _), n in result.statuses.items() if kind == "write")
            assert writes == 20 == sum(len(t) for t in result.acknowledged.values()) - 2
            polls = {status for (kind, status) in result.statuses if kind != "write"}
            assert polls <= {200, 304}, result.statuses
            assert sum(n for (kind, _), n in result.statuses.items() if kind != "write") > 0
            assert check_stored(client, result) == []
    finally:
        server.stop()
    record("load.test_requests", sum(result.statuses.values()))
