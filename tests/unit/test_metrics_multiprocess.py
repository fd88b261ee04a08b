"""Request metrics add up across worker processes in prometheus-client's multiprocess mode."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from prometheus_client.parser import text_string_to_metric_families

COUNT = """
from service import metrics
for _ in range({n}):
    metrics.REQUESTS.labels("GET", "/v1/alerts", "200").inc()
"""
EXPOSE = """
import sys
from service import metrics
from service.db.session import Database
database = Database("sqlite:///{db}")
database.migrate()
sys.stdout.write(metrics.exposition(database).decode())
"""


def run(code: str, env: dict[str, str]) -> str:
    done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                          timeout=120, check=False)
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_counts_of_separate_processes_are_summed(tmp_path: Path) -> None:
    shared = tmp_path / "prom"
    shared.mkdir()
    env = {**os.environ, "PROMETHEUS_MULTIPROC_DIR": str(shared)}
    run(COUNT.format(n=3), env)
    run(COUNT.format(n=4), env)
    text = run(EXPOSE.format(db=tmp_path / "inrush.db"), env)
    # Parsed with prometheus-client's own exposition parser (the reference implementation).
    families = {f.name: f for f in text_string_to_metric_families(text)}
    samples = [s for s in families["inrush_http_requests"].samples
               if s.name == "inrush_http_requests_total"]
    assert [(s.labels["route"], s.value) for s in samples] == [("/v1/alerts", 7.0)]
    assert families["inrush_metrics_database_up"].samples[0].value == 1.0
