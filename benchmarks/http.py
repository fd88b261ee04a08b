"""HTTP service benchmarks against a live ``inrush serve`` (one worker) on the loopback address.

* ``speed.ingest_rows_per_s``: rows per second of ``PUT /v1/experiments/{id}/observations``
  (the whole request: validation, upsert and the diagnosis re-run it triggers), CSV and JSON,
  180 days x 4 arms x 12 sources x 3 metrics in one request; the median over fresh uploads and
  re-sent uploads (which replace every row).
* ``speed.poll_requests_per_s``: conditional ``GET .../diagnosis`` with ``If-None-Match`` (answered
  304) from a separate load process (``wrk``), with the p99 latency beside it.
* ``scale.reanalysis_1000_experiments_s``: 1000 experiments each hold 28 days (2 arms,
  4 sources, 1 metric); the next day's rows arrive for every one of them (one PUT each, which
  re-runs its diagnosis over 29 days); the wall time until all 1000 are re-diagnosed, sent by
  a client with 4 connections.

Each is measured on the default SQLite database and, in a full run, again on PostgreSQL
(``..._postgresql``). The share of CPU time the hypervisor took meanwhile (``steal`` in
``/proc/stat``) is recorded beside them: on a shared virtual machine it varies from run to run.

All traffic goes to 127.0.0.1; every loop is bounded in count and time. When the service cannot
be imported or started, each figure records ``"not run: <reason>"``.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import datetime as dt
import importlib.util
import io
import json
import os
import re
import secrets
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable, Iterator
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np

from .simulate import Scenario, Simulation, many_sources, simulate

HOST = "127.0.0.1"
POSTGRES_ADMIN = "postgresql://postgres@127.0.0.1:5432/postgres"
FIGURES = ("speed.ingest_rows_per_s", "speed.poll_requests_per_s",
           "scale.reanalysis_1000_experiments_s")


def not_run(reason: str) -> dict[str, Any]:
    return {"figures": {name: f"not run: {reason}" for name in FIGURES},
            "details": {"not_run": reason}}


def _free_port() -> int:
    with contextlib.closing(socket.socket(socket.AF_INET, socket.SOCK_STREAM)) as sock:
        sock.bind((HOST, 0))
        return int(sock.getsockname()[1])


@contextlib.contextmanager
def postgres_database() -> Iterator[tuple[str | None, str]]:
    """A fresh PostgreSQL database for the run, dropped afterwards: ``(url, "")``, or
    ``(None, reason)`` when no server or driver is available."""
    try:
        import psycopg

        name = f"inrush_bench_{os.getpid()}"
        with psycopg.connect(POSTGRES_ADMIN, autocommit=True, connect_timeout=3) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}"')
            conn.execute(f'CREATE DATABASE "{name}"')
    except Exception as error:  # no server, no driver
        yield None, f"PostgreSQL unavailable ({type(error).__name__})"
        return
    try:
        yield f"postgresql+psycopg://postgres@127.0.0.1:5432/{name}", ""
    finally:
        with contextlib.suppress(Exception), psycopg.connect(POSTGRES_ADMIN,
                                                               autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


class Server:
    """``inrush serve`` as a child process with its own admin token."""

    def __init__(self, database_url: str, workdir: Path) -> None:
        self.port = _free_port()
        self.base = f"http://{HOST}:{self.port}"
        self.token = secrets.token_urlsafe(24)
        env = {**os.environ, "INRUSH_DATABASE_URL": database_url,
               "INRUSH_ADMIN_TOKEN": self.token, "INRUSH_PUBLIC_URL": self.base,
               "INRUSH_MAX_ROWS": "100000"}
        self.log = (workdir / "server.log").open("wb")
        self.process = subprocess.Popen(
            [sys.executable, "-m", "service.cli", "serve", "--host", HOST, "--port",
             str(self.port), "--workers", "1"], env=env, stdout=self.log, stderr=subprocess.STDOUT,
            cwd=workdir)
        self.workdir = workdir

    def wait_healthy(self, client: Any, timeout: float = 60.0) -> None:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.process.poll() is not None:
                raise RuntimeError(f"server exited with {self.process.returncode}: "
                                   + self.log_tail())
            with contextlib.suppress(Exception):
                if client.get("/healthz").status_code == 200:
                    return
            time.sleep(0.2)
        raise RuntimeError("server did not become healthy within 60 s: " + self.log_tail())

    def log_tail(self) -> str:
        if not self.log.closed:
            self.log.flush()
        text = (self.workdir / "server.log").read_text(errors="replace")
        return text[-800:]

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(timeout=15)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(timeout=5)
        self.log.close()


def _check(response: Any, expected: tuple[int, ...] = (200, 201)) -> Any:
    if response.status_code not in expected:
        raise RuntimeError(f"{response.request.method} {response.request.url.path} -> "
                           f"{response.status_code}: {response.text[:400]}")
    return response


def _recent_start(n_days: int) -> dt.date:
    # Observation dates may not lie in the future: end the simulated period yesterday.
    return dt.datetime.now(dt.UTC).date() - dt.timedelta(days=n_days + 1)


def _create(client: Any, experiment_id: str, sim: Simulation) -> None:
    s = sim.scenario
    _check(client.post("/v1/experiments", json={
        "id": experiment_id, "title": f"Benchmark {experiment_id}",
        "start_date": s.start_date.isoformat(), "arms": list(s.arms),
        "allocation": [{"from": (s.start_date + dt.timedelta(days=d)).isoformat(),
                        "weights": list(w)} for d, w in s.allocation]}))


def ingest(client: Any, repeats: int, log: Callable[[str], None]) -> dict[str, Any]:
    scenario = Scenario(n_days=180, arms=("control", "cards", "map_first", "photo_grid"),
                        allocation=((0, (0.25, 0.25, 0.25, 0.25)),), daily_units=40_000.0,
                        sources=many_sources(12),
                        metrics=("routes_saved", "minutes_on_route", "photos_shared"),
                        lifts=(0.0, 0.05, 0.02, -0.01), start_date=_recent_start(180))
    sim = simulate(scenario, np.random.default_rng(11))
    frame = sim.to_frame()
    buffer = io.StringIO()
    frame.to_csv(buffer, index=False)
    # Both bodies are encoded once, before any timing: the figure is the server's, not the
    # client's JSON encoder's.
    bodies = {"csv": (buffer.getvalue().encode(), "text/csv"),
              "json": (json.dumps({"rows": sim.to_records()}).encode(), "application/json")}
    rows = len(frame)
    out: dict[str, Any] = {"rows_per_request": rows, "csv_bytes": len(bodies["csv"][0]),
                           "json_bytes": len(bodies["json"][0])}
    for fmt, (content, kind) in bodies.items():
        timings: dict[str, list[float]] = {"insert": [], "replace": []}
        for rep in range(repeats):
            experiment_id = f"ingest-{fmt}-{rep}"
            _create(client, experiment_id, sim)
            for phase in ("insert", "replace"):
                start = time.perf_counter()
                response = client.put(f"/v1/experiments/{experiment_id}/observations",
                                      content=content, headers={"Content-Type": kind})
                _check(response)
                timings[phase].append(time.perf_counter() - start)
                written = response.json().get("written")
                if written != rows:
                    raise RuntimeError(f"{fmt} {phase}: wrote {written} of {rows} rows")
        every = timings["insert"] + timings["replace"]
        out[fmt] = {"rows_per_s_median": rows / statistics.median(every),
                    "insert_s": timings["insert"], "replace_s": timings["replace"]}
        log(f"  ingest {fmt}: {out[fmt]['rows_per_s_median']:,.0f} rows/s")
    return out


def find_wrk(allow_install: bool) -> tuple[str | None, str]:
    path = shutil.which("wrk")
    if path:
        return path, "found"
    if not allow_install or shutil.which("apt-get") is None or os.geteuid() != 0:
        return None, "wrk is not installed (Debian package `wrk`)"
    for command in (["apt-get", "update", "-qq"], ["apt-get", "install", "-y", "-qq", "wrk"]):
        try:
            subprocess.run(command, check=True, capture_output=True, timeout=300)
        except (subprocess.SubprocessError, OSError) as error:
            return None, f"could not install wrk with apt-get ({type(error).__name__})"
    path = shutil.which("wrk")
    return (path, "installed with apt-get") if path else (None, "wrk missing after install")


_UNITS = {"us": 1e-3, "ms": 1.0, "s": 1e3, "m": 6e4}


def _ms(text: str) -> float:
    match = re.fullmatch(r"([\d.]+)(us|ms|s|m)", text.strip())
    if not match:
        raise ValueError(text)
    return float(match.group(1)) * _UNITS[match.group(2)]


def parse_wrk(output: str) -> dict[str, Any]:
    """Requests/s, latency percentiles and error counts from ``wrk --latency`` output."""
    result: dict[str, Any] = {}
    rps = re.search(r"Requests/sec:\s+([\d.]+)", output)
    result["requests_per_s"] = float(rps.group(1)) if rps else None
    for pct in ("50", "75", "90", "99"):
        match = re.search(rf"^\s+{pct}(?:\.000)?%\s+(\S+)", output, re.MULTILINE)
        result[f"p{pct}_ms"] = _ms(match.group(1)) if match else None
    total = re.search(r"(\d+) requests in ([\d.]+\w+)", output)
    result["requests"] = int(total.group(1)) if total else None
    non2xx = re.search(r"Non-2xx or 3xx responses:\s+(\d+)", output)
    result["non_2xx_3xx"] = int(non2xx.group(1)) if non2xx else 0
    errors = re.search(r"Socket errors:(.*)", output)
    result["socket_errors"] = errors.group(1).strip() if errors else None
    return result


def poll(client: Any, server: Server, wrk: str, seconds: int, connections: int,
         log: Callable[[str], None]) -> dict[str, Any]:
    experiment_id = "ingest-csv-0"
    path = f"/v1/experiments/{experiment_id}/diagnosis"
    first = _check(client.get(path))
    etag = first.headers.get("ETag")
    if not etag:
        raise RuntimeError("the diagnosis has no ETag header")
    again = client.get(path, headers={"If-None-Match": etag})
    if again.status_code != 304:
        raise RuntimeError(f"conditional GET answered {again.status_code}, not 304")
    command = [wrk, "-t1", f"-c{connections}", f"-d{seconds}s", "--latency", "--timeout", "5s",
               "-H", f"Authorization: Bearer {server.token}", "-H", f"If-None-Match: {etag}",
               server.base + path]
    done = subprocess.run(command, capture_output=True, text=True, timeout=seconds + 60,
                          check=False)
    if done.returncode != 0:
        raise RuntimeError(f"wrk failed: {done.stderr[-300:]}")
    result = parse_wrk(done.stdout)
    result |= {"connections": connections, "threads": 1, "seconds": seconds,
               "status_checked": 304, "body_bytes_unconditional": len(first.content)}
    log(f"  poll: {result['requests_per_s']} req/s, p99 {result['p99_ms']} ms")
    return result


def reanalysis(base: str, token: str, count: int, log: Callable[[str], None]) -> dict[str, Any]:
    import httpx

    scenario = replace(Scenario(n_days=29, start_date=_recent_start(29)))
    headers = {"Authorization": f"Bearer {token}"}
    sims = []
    setup_start = time.perf_counter()

    def setup(i: int) -> None:
        sim = simulate(scenario, np.random.default_rng([29, i]))
        frame = sim.to_frame()
        last = frame["date"] == frame["date"].max()
        with httpx.Client(base_url=base, headers=headers, timeout=60) as c:
            _create(c, f"fleet-{i:04d}", sim)
            buffer = io.StringIO()
            frame[~last].to_csv(buffer, index=False)
            _check(c.put(f"/v1/experiments/fleet-{i:04d}/observations",
                         content=buffer.getvalue(), headers={"Content-Type": "text/csv"}))
        tail = io.StringIO()
        frame[last].to_csv(tail, index=False)
        sims.append((i, tail.getvalue()))

    with concurrent.futures.ThreadPoolExecutor(4) as pool:
        list(pool.map(setup, range(count)))
    setup_s = time.perf_counter() - setup_start
    log(f"  reanalysis: {count} experiments set up in {setup_s:.1f} s")
    clients = [httpx.Client(base_url=base, headers=headers, timeout=60) for _ in range(4)]

    def next_day(item: tuple[int, str]) -> str:
        i, body = item
        client = clients[i % 4]
        answer = _check(client.put(f"/v1/experiments/fleet-{i:04d}/observations",
                                   content=body, headers={"Content-Type": "text/csv"})).json()
        return str(answer.get("diagnosis", {}).get("status"))

    start = time.perf_counter()
    with concurrent.futures.ThreadPoolExecutor(4) as pool:
        statuses = list(pool.map(next_day, sorted(sims)))
    elapsed = time.perf_counter() - start
    for c in clients:
        c.close()
    counts: dict[str, int] = {}
    for s in statuses:
        counts[s] = counts.get(s, 0) + 1
    log(f"  reanalysis: {count} re-diagnosed in {elapsed:.1f} s")
    return {"experiments": count, "seconds": elapsed, "setup_seconds": setup_s,
            "statuses": counts, "rows_per_experiment": "28 days x 2 arms x 4 sources, +1 day",
            "seconds_per_1000": elapsed * 1000 / count}


def cpu_times() -> dict[str, float] | None:
    """Cumulative CPU time of the whole machine by kind (``/proc/stat``, in clock ticks)."""
    try:
        fields = Path("/proc/stat").read_text().splitlines()[0].split()[1:]
    except (OSError, IndexError):
        return None
    names = ("user", "nice", "system", "idle", "iowait", "irq", "softirq", "steal")
    return {name: float(value) for name, value in zip(names, fields, strict=False)}


def steal_share(before: dict[str, float] | None, after: dict[str, float] | None
                ) -> float | None:
    """Share of the machine's CPU time the hypervisor gave to others meanwhile (``steal``)."""
    if not before or not after or "steal" not in after:
        return None
    spent = {k: after[k] - before.get(k, 0.0) for k in after}
    total = sum(spent.values())
    return spent["steal"] / total if total > 0 else None


def run_backend(url: str, full: bool, workdir: Path, log: Callable[[str], None]
                ) -> tuple[dict[str, Any], dict[str, Any]]:
    """The three measurements against one server on ``url``: (figures, details)."""
    import httpx

    figures: dict[str, Any] = {}
    details: dict[str, Any] = {}
    workdir.mkdir(parents=True, exist_ok=True)
    before = cpu_times()
    server = Server(url, workdir)
    try:
        client = httpx.Client(base_url=server.base, timeout=120,
                              headers={"Authorization": f"Bearer {server.token}"})
        server.wait_healthy(client)
        details["server"] = "inrush serve, one worker process"
        try:
            got = ingest(client, 3 if full else 1, log)
            details["ingest"] = got
            figures["speed.ingest_rows_per_s"] = {
                "csv": round(got["csv"]["rows_per_s_median"]),
                "json": round(got["json"]["rows_per_s_median"])}
        except Exception as error:
            figures["speed.ingest_rows_per_s"] = f"not run: {error}"
        wrk, how = find_wrk(allow_install=full)
        details["wrk"] = how
        if wrk is None:
            figures["speed.poll_requests_per_s"] = f"not run: {how}"
        elif isinstance(figures["speed.ingest_rows_per_s"], str):
            figures["speed.poll_requests_per_s"] = "not run: no experiment was ingested"
        else:
            try:
                got = poll(client, server, wrk, 15 if full else 2, 16, log)
                details["poll"] = got
                figures["speed.poll_requests_per_s"] = got["requests_per_s"]
                figures["speed.poll_p99_ms"] = got["p99_ms"]
            except Exception as error:
                figures["speed.poll_requests_per_s"] = f"not run: {error}"
        count = 1000 if full else 10
        try:
            got = reanalysis(server.base, server.token, count, log)
            details["reanalysis"] = got
            figures["scale.reanalysis_1000_experiments_s"] = (
                got["seconds"] if count == 1000 else got["seconds_per_1000"])
            if count != 1000:
                details["reanalysis"]["note"] = f"quick run: {count} experiments, scaled to 1000"
        except Exception as error:
            figures["scale.reanalysis_1000_experiments_s"] = f"not run: {error}"
        client.close()
    finally:
        server.stop()
        details["server_log_tail"] = server.log_tail()[-400:]
        details["cpu_steal_share"] = steal_share(before, cpu_times())
    for name in FIGURES:
        figures.setdefault(name, "not run: see details")
    return figures, details


def run(full: bool, log: Callable[[str], None] = print) -> dict[str, Any]:
    """Every measurement on the default SQLite database and, in a full run, again on
    PostgreSQL when it is reachable (figures named ``..._postgresql``)."""
    if importlib.util.find_spec("service.app") is None:
        return not_run("the service (service/app.py) is not importable")
    if importlib.util.find_spec("httpx") is None:
        return not_run("httpx is not installed")
    workdir = Path(tempfile.mkdtemp(prefix="inrush-bench-"))
    figures: dict[str, Any] = {}
    details: dict[str, Any] = {"backends": {}}
    try:
        log("  on sqlite (the default database)")
        got, about = run_backend(f"sqlite:///{workdir / 'bench.db'}", full, workdir / "sqlite",
                                 log)
        figures.update(got)
        details["backends"]["sqlite"] = about
        if full:
            with postgres_database() as (url, reason):
                if url is None:
                    details["postgresql_not_run"] = reason
                    figures.update({f"{name}_postgresql": f"not run: {reason}"
                                    for name in FIGURES})
                else:
                    log("  on postgresql")
                    got, about = run_backend(url, full, workdir / "postgresql", log)
                    figures.update({f"{name}_postgresql": value for name, value in got.items()})
                    details["backends"]["postgresql"] = about
    except Exception as error:
        return not_run(f"{type(error).__name__}: {error}")
    finally:
        shutil.rmtree(workdir, ignore_errors=True)
    return {"figures": figures, "details": details}
