"""Record the reliability and load figures in ``benchmarks/RESULTS.md``.

``python -m benchmarks.reliability_report`` (from the repository root):

1. runs ``tests/reliability`` with ``INRUSH_RELIABILITY_STATS`` set, collecting what the tests
   tried: kinds of bad input, fuzz cases sent per backend, faults injected and how the service
   answered them;
2. runs a larger bounded load (concurrent writers and pollers, loopback only) against a live
   ``inrush serve`` on SQLite and, when reachable, PostgreSQL; checks that every acknowledged
   write is stored exactly once; computes latency percentiles per kind of request;
3. replaces the section between ``<!-- reliability:start -->`` and ``<!-- reliability:end -->``
   in ``RESULTS.md`` (appending it when absent; the rest of the file is left alone) and writes
   the raw figures to ``benchmarks/reliability.json``.

Latencies are measured, never asserted: the tests check correctness only.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime as dt
import json
import os
import platform
import subprocess
import sys
import tempfile
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
RESULTS_MD = HERE / "RESULTS.md"
RAW_JSON = HERE / "reliability.json"
START, END = "<!-- reliability:start -->", "<!-- reliability:end -->"


def cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def run_reliability_tests() -> dict[str, Any]:
    """Run tests/reliability once; the figures the tests recorded and the outcome."""
    with tempfile.TemporaryDirectory(prefix="inrush-reliability-") as directory:
        stats = Path(directory) / "stats.jsonl"
        env = {**os.environ, "INRUSH_RELIABILITY_STATS": str(stats)}
        completed = subprocess.run(
            [sys.executable, "-m", "pytest", "-q", "-p", "no:cacheprovider", "tests/reliability"],
            cwd=ROOT, env=env, capture_output=True, text=True, check=False)
        figures: dict[str, Any] = {}
        if stats.exists():
            for line in stats.read_text().splitlines():
                item = json.loads(line)
                name, value = item["name"], item["value"]
                # A figure recorded by several tests (one per backend) is summed.
                figures[name] = figures.get(name, 0) + value if isinstance(value, int) \
                    and name in figures else value
    summary = next((line for line in reversed(completed.stdout.splitlines())
                    if " passed" in line or " failed" in line), completed.stdout[-300:])
    return {"figures": figures, "summary": summary.strip("= "), "exit_code": completed.returncode}


def run_load(backend: str, writers: int, writes: int, pollers: int) -> dict[str, Any]:
    from tests.reliability.loadgen import check_stored, percentiles, prepare
    from tests.reliability.loadgen import run_load as drive
    from tests.reliability.support import LiveServer, postgres_database, postgres_problem

    with tempfile.TemporaryDirectory(prefix="inrush-load-") as directory:
        if backend == "postgres":
            problem = postgres_problem()
            if problem:
                return {"skipped": problem}
            context: Any = postgres_database("inrush_load")
        else:
            context = contextlib.nullcontext(f"sqlite:///{Path(directory) / 'inrush.db'}")
        with context as url:
            server = LiveServer(url, Path(directory) / "server.log").start()
            try:
                with server.client() as client:
                    seeded = prepare(client)
                    result = drive(server.base_url, server.headers, seeded, writers=writers,
                                   writes_per_writer=writes, pollers=pollers)
                    problems = check_stored(client, result)
            finally:
                server.stop()
    statuses: dict[str, dict[str, int]] = {}
    for (kind, status), count in sorted(result.statuses.items()):
        statuses.setdefault(kind, {})[str(status)] = count
    requests = sum(result.statuses.values())
    return {
        "writers": writers, "writes_per_writer": writes, "pollers": pollers,
        "seconds": round(result.seconds, 2), "requests": requests,
        "requests_per_second": round(requests / result.seconds, 1) if result.seconds else None,
        "acknowledged_writes": sum(len(t) for t in result.acknowledged.values()),
        "refused": [str(r) for r in result.refused],
        "statuses": statuses,
        "latency_ms": {kind: {k: round(v, 1) for k, v in percentiles(values).items()}
                       for kind, values in sorted(result.latencies.items())},
        "stored_exactly_once": not problems, "problems": problems,
    }


def markdown(report: dict[str, Any]) -> str:
    tests, figures = report["tests"], report["tests"]["figures"]
    lines = [START, "## Reliability and load", "",
             f"Recorded {report['recorded']} by `python -m benchmarks.reliability_report` on "
             f"{report['machine']} ({report['cores']} cores), Python {report['python']}. "
             "Figures are measurements, not goals; the tests in `tests/reliability` assert "
             "correctness only.", "",
             f"Reliability tests: {tests['summary']}.", "", "What was tried:", ""]
    lines.append(f"- kinds of bad request in the catalogue: {figures.get('bad_input.kinds', '?')}"
                 " (each on SQLite and PostgreSQL; every one a named 4xx problem, database "
                 "unchanged)")
    fuzz = {k.rsplit(".", 1)[1]: v for k, v in figures.items() if k.startswith("fuzz.cases.")}
    lines.append("- fuzz cases sent by schemathesis (all operations, valid and invalid data, "
                 f"admin token, {report['fuzz_examples']} examples per operation): "
                 + (", ".join(f"{k} {v}" for k, v in sorted(fuzz.items())) or "none recorded"))
    def fault(name: str) -> Any:
        return figures.get(f"faults.{name}", "not run")

    lines += [
        "- faults injected:",
        f"  - SIGKILL of a live server during 6 concurrent writers: {fault('sigkill')} (after "
        "restart every acknowledged batch present, none partial, integrity_check ok)",
        "  - webhook receiver down / too slow / answering 500 until every notification had "
        f"failed once: {fault('webhook_down.failed_attempts')} / "
        f"{fault('webhook_slow.failed_attempts')} / {fault('webhook_error.failed_attempts')} "
        "failed attempts recorded (both backends), then every notification delivered",
        "  - SQLite write lock held past the busy timeout: "
        f"{fault('sqlite_lock.refused_503')} requests answered 503 with Retry-After",
        "  - PostgreSQL refusing connections, sessions terminated: "
        f"{fault('postgres_outage.refused_503')} requests answered 503 with Retry-After, "
        "then recovery without a restart", ""]
    for backend, load in report["load"].items():
        lines.append(f"Load on {backend}:")
        lines.append("")
        if "skipped" in load:
            lines += [f"- not run: {load['skipped']}", ""]
            continue
        lines.append(
            f"- {load['writers']} writers x {load['writes_per_writer']} uploads of 10 rows, "
            f"{load['pollers']} pollers, one server process: {load['requests']} requests in "
            f"{load['seconds']} s ({load['requests_per_second']} per second)")
        lines.append(f"- acknowledged writes: {load['acknowledged_writes']}; stored exactly "
                     f"once and as sent: {'yes' if load['stored_exactly_once'] else 'NO'}"
                     + (f" ({'; '.join(load['problems'])})" if load["problems"] else "")
                     + (f"; refused: {len(load['refused'])}" if load["refused"] else ""))
        lines += ["", "| request | count | statuses | p50 ms | p95 ms | p99 ms |",
                  "|---|---|---|---|---|---|"]
        for kind, cuts in load["latency_ms"].items():
            counts = load["statuses"].get(kind, {})
            lines.append(f"| {kind} | {sum(counts.values())} | "
                         + ", ".join(f"{s}: {n}" for s, n in counts.items())
                         + f" | {cuts.get('p50', '')} | {cuts.get('p95', '')} | "
                           f"{cuts.get('p99', '')} |")
        lines.append("")
    lines.append(END)
    return "\n".join(lines) + "\n"


def write_section(section: str, path: Path = RESULTS_MD) -> None:
    """Replace our section of ``path`` (or append it); nothing else in the file changes."""
    text = path.read_text() if path.exists() else ""
    if START in text and END in text:
        before, rest = text.split(START, 1)
        after = rest.split(END, 1)[1].lstrip("\n")
        text = before + section + ("\n" + after if after else "")
    else:
        text = text + ("\n" if text and not text.endswith("\n\n") else "") + section
    path.write_text(text)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--writers", type=int, default=8)
    parser.add_argument("--writes", type=int, default=25, help="uploads per writer")
    parser.add_argument("--pollers", type=int, default=4)
    parser.add_argument("--skip-tests", action="store_true",
                        help="do not run tests/reliability (keeps the counts of the last run)")
    args = parser.parse_args(argv)
    previous = json.loads(RAW_JSON.read_text()) if RAW_JSON.exists() else {}
    tests = (previous.get("tests", {"figures": {}, "summary": "not run", "exit_code": None})
             if args.skip_tests else run_reliability_tests())
    report = {
        "recorded": dt.datetime.now(dt.UTC).strftime("%Y-%m-%d %H:%M UTC"),
        "machine": cpu_model(), "cores": os.cpu_count(), "python": platform.python_version(),
        "fuzz_examples": int(os.environ.get("INRUSH_FUZZ_EXAMPLES", "25")),
        "tests": tests,
        "load": {backend: run_load(backend, args.writers, args.writes, args.pollers)
                 for backend in ("sqlite", "postgres")},
    }
    RAW_JSON.write_text(json.dumps(report, indent=2, default=str) + "\n")
    write_section(markdown(report))
    print(markdown(report))
    ok = tests.get("exit_code") in (0, None) and all(
        load.get("stored_exactly_once", True) for load in report["load"].values())
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())
