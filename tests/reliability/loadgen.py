"""A bounded load on a live server: concurrent writers and pollers, then a check of what is
stored. Used by ``test_load.py`` (small, asserts correctness) and by
``benchmarks/reliability_report.py`` (larger, records latencies).

Writers upload distinctive batches (one source per request over a few days and both arms) to
two experiments; pollers fetch the diagnosis (with ``If-None-Match``), the daily series, the
alert list and the experiment list until the writers are done. Loopback only.
"""

from __future__ import annotations

import statistics
import threading
import time
from collections import Counter
from dataclasses import dataclass, field
from typing import Any

import httpx

from tests.reliability.support import EXPERIMENT, batch_rows, expected_batch, rows_by_source

EXPERIMENTS = ("route-cards", "route-cards-mobile")
DAYS = 5


@dataclass
class LoadResult:
    acknowledged: dict[str, set[str]] = field(default_factory=dict)  # experiment -> tags
    refused: list[tuple[str, Any]] = field(default_factory=list)  # (tag, status or error)
    latencies: dict[str, list[float]] = field(default_factory=dict)  # kind -> seconds
    statuses: Counter[tuple[str, int]] = field(default_factory=Counter)
    seconds: float = 0.0

    def add(self, kind: str, status: int, seconds: float) -> None:
        self.latencies.setdefault(kind, []).append(seconds)
        self.statuses[(kind, status)] += 1


def prepare(client: httpx.Client) -> dict[str, set[str]]:
    """Create the experiments, each with a first batch (so that pollers find a diagnosis)."""
    seeded: dict[str, set[str]] = {}
    for experiment_id in EXPERIMENTS:
        answer = client.post("/v1/experiments", json={**EXPERIMENT, "id": experiment_id})
        assert answer.status_code == 201, answer.text
        tag = f"first-{experiment_id}"
        answer = client.put(f"/v1/experiments/{experiment_id}/observations",
                            json={"rows": batch_rows(tag, DAYS)})
        assert answer.status_code == 200, answer.text
        seeded[experiment_id] = {tag}
    return seeded


def run_load(base_url: str, headers: dict[str, str], seeded: dict[str, set[str]], *,
             writers: int, writes_per_writer: int, pollers: int,
             timeout: float = 120.0) -> LoadResult:
    """Run the load after :func:`prepare`; every request's latency and status is kept."""
    result = LoadResult(acknowledged={e: set(seeded.get(e, ())) for e in EXPERIMENTS})
    lock = threading.Lock()
    done = threading.Event()

    def writer(number: int) -> None:
        experiment_id = EXPERIMENTS[number % len(EXPERIMENTS)]
        with httpx.Client(base_url=base_url, headers=headers, timeout=timeout) as client:
            for k in range(writes_per_writer):
                tag = f"load{number}x{k}"
                started = time.perf_counter()
                try:
                    answer = client.put(f"/v1/experiments/{experiment_id}/observations",
                                        json={"rows": batch_rows(tag, DAYS)})
                except httpx.HTTPError as error:
                    with lock:
                        result.refused.append((tag, repr(error)))
                    continue
                with lock:
                    result.add("write", answer.status_code, time.perf_counter() - started)
                    if answer.status_code == 200:
                        result.acknowledged[experiment_id].add(tag)
                    else:
                        result.refused.append((tag, answer.status_code))

    def poller(number: int) -> None:
        experiment_id = EXPERIMENTS[number % len(EXPERIMENTS)]
        etag: str | None = None
        paths = [("diagnosis", f"/v1/experiments/{experiment_id}/diagnosis"),
                 ("series", f"/v1/experiments/{experiment_id}/series"),
                 ("alerts", f"/v1/alerts?experiment={experiment_id}"),
                 ("experiments", "/v1/experiments")]
        with httpx.Client(base_url=base_url, headers=headers, timeout=timeout) as client:
            while not done.is_set():
                for kind, path in paths:
                    extra = {"If-None-Match": etag} if kind == "diagnosis" and etag else {}
                    started = time.perf_counter()
                    try:
                        answer = client.get(path, headers=extra)
                    except httpx.HTTPError as error:
                        with lock:
                            result.refused.append((kind, repr(error)))
                        continue
                    with lock:
                        result.add(kind, answer.status_code, time.perf_counter() - started)
                    if kind == "diagnosis" and answer.status_code == 200:
                        etag = answer.headers.get("etag")

    started = time.perf_counter()
    write_threads = [threading.Thread(target=writer, args=(n,)) for n in range(writers)]
    poll_threads = [threading.Thread(target=poller, args=(n,)) for n in range(pollers)]
    for thread in [*write_threads, *poll_threads]:
        thread.start()
    for thread in write_threads:
        thread.join()
    done.set()
    for thread in poll_threads:
        thread.join()
    result.seconds = time.perf_counter() - started
    return result


def check_stored(client: httpx.Client, result: LoadResult) -> list[str]:
    """What is wrong with the stored state after the load (empty: nothing)."""
    problems: list[str] = []
    for experiment_id, tags in result.acknowledged.items():
        rows = client.get(f"/v1/experiments/{experiment_id}/observations").json()["rows"]
        keys = [(r["date"], r["arm"], r["source"]) for r in rows]
        if len(keys) != len(set(keys)):
            problems.append(f"{experiment_id}: a row is stored twice")
        by_source = rows_by_source(rows)
        for tag in tags:
            if by_source.get(tag) != expected_batch(tag, DAYS):
                problems.append(f"{experiment_id}: acknowledged batch {tag} is not stored as "
                                "sent")
        extra = set(by_source) - tags
        if extra:
            problems.append(f"{experiment_id}: unacknowledged batches stored: {sorted(extra)}")
        if len(rows) != len(tags) * 2 * DAYS:
            problems.append(f"{experiment_id}: {len(rows)} rows stored for {len(tags)} batches")
        versions = [v["version"] for v in client.get(
            f"/v1/experiments/{experiment_id}/diagnoses", params={"limit": 500}).json()["items"]]
        if sorted(versions) != list(range(1, len(versions) + 1)):
            problems.append(f"{experiment_id}: diagnosis versions {sorted(versions)} are not "
                            "1..n")
        if tags:
            diagnosis = client.get(f"/v1/experiments/{experiment_id}/diagnosis").json()
            if sum(diagnosis["srm"]["observed"].values()) != sum(r["entered"] for r in rows):
                problems.append(f"{experiment_id}: the latest diagnosis does not count every "
                                "stored unit")
        alerts = client.get("/v1/alerts", params={"experiment": experiment_id,
                                                  "limit": 500}).json()["items"]
        if len({(a["kind"], a["key"]) for a in alerts}) != len(alerts):
            problems.append(f"{experiment_id}: an alert is stored twice")
    return problems


def percentiles(values: list[float]) -> dict[str, float]:
    """p50, p95 and p99 in milliseconds (inclusive method on the sorted sample)."""
    if not values:
        return {}
    if len(values) == 1:
        return {"p50": values[0] * 1000, "p95": values[0] * 1000, "p99": values[0] * 1000}
    cuts = statistics.quantiles(values, n=100, method="inclusive")
    return {"p50": cuts[49] * 1000, "p95": cuts[94] * 1000, "p99": cuts[98] * 1000}
