"""Wide experiments: what one experiment's size costs each request, over a range of sizes.

For each size (days x 4 arms x sources x 3 metrics, see :mod:`benchmarks.wide_data`) a fresh
database and a live ``inrush serve`` (one worker) on the loopback address are set up, the rows
are uploaded in parts, and then, with everything warm, these are timed (median of
``--repeats``):

* ``reupload``: ``PUT`` of the last day again with other values (replaces 4 x sources rows;
  the whole request, diagnosis included);
* ``other_upload_during``: a one-day upload to a small second experiment sent while the wide
  one's re-upload is running, against ``other_upload_alone`` (the same without it): on SQLite,
  if the wide experiment's diagnosis held the database's write lock, the small upload would
  wait for it;
* ``status_page``: ``GET /experiments/{id}`` (charts, effect estimate, sensitivity), read
  again; ``status_page_first``: its first view after an upload (the charts are drawn then);
* ``reweight``: ``POST .../reweight`` on the first metric with defaults;
* ``series``: ``GET .../series``;
* ``csv_export``, ``json_export``: ``GET .../observations`` read to the end, with the server
  process's peak resident memory during the export (``VmHWM`` after resetting it through
  ``/proc/PID/clear_refs``) beside its resident memory before it.

``python -m benchmarks.wide_bench [--sizes 37x100,365x100] [--postgres]`` rewrites the section
between ``<!-- wide:start -->`` and ``<!-- wide:end -->`` of ``RESULTS.md`` and the
``wide`` entry of ``results.json``. The machine is shared, so the CPU time the hypervisor
took (``steal``) is recorded too.
"""

from __future__ import annotations

import argparse
import concurrent.futures
import datetime as dt
import json
import os
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from .http import Server, _check, cpu_times, postgres_database, steal_share
from .sections import write_section
from .wide_data import WIDE_ARMS, wide_csv

HERE = Path(__file__).resolve().parent
START, END = "<!-- wide:start -->", "<!-- wide:end -->"
DEFAULT_SIZES = ((37, 100), (92, 100), (183, 100), (365, 100), (365, 250), (365, 500))
GOALS = {  # seconds at 146k rows (365 x 4 x 100); the re-upload also at 730k
    ("reupload", 146_000): 0.5, ("reupload", 730_000): 2.0,
    ("status_page", 146_000): 1.0, ("reweight", 146_000): 0.5,
}
PART_BYTES = 8 * 1024 * 1024  # upload parts stay under the default body limit
WIDE, SMALL = "trail-wide", "trail-small"


def _rss_kib(pid: int, field: str) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith(field + ":"):
            return int(line.split()[1])
    raise RuntimeError(f"no {field} for process {pid}")


def _reset_peak(pid: int) -> None:
    Path(f"/proc/{pid}/clear_refs").write_text("5")  # 5: reset the peak resident size


def _median(action: Callable[[], Any], repeats: int) -> float:
    timings = []
    for _ in range(repeats):
        started = time.perf_counter()
        action()
        timings.append(time.perf_counter() - started)
    return statistics.median(timings)


def _create(client: Any, experiment_id: str, start: dt.date, arms: tuple[str, ...]) -> None:
    _check(client.post("/v1/experiments", json={
        "id": experiment_id, "title": f"Scale check {experiment_id}",
        "start_date": start.isoformat(), "arms": list(arms),
        "allocation": [{"from": start.isoformat(), "weights": [1 / len(arms)] * len(arms)}]}))


def _put_csv(client: Any, experiment_id: str, body: bytes) -> Any:
    return _check(client.put(f"/v1/experiments/{experiment_id}/observations", content=body,
                             headers={"Content-Type": "text/csv"}), (200,))


def measure_size(url: str, days: int, sources: int, repeats: int, workdir: Path,
                 log: Callable[[str], None]) -> dict[str, Any]:
    import httpx

    rows = days * len(WIDE_ARMS) * sources
    start = dt.date.today() - dt.timedelta(days=days)
    server = Server(url, workdir)
    try:
        with httpx.Client(base_url=server.base, timeout=600.0,
                          headers={"Authorization": f"Bearer {server.token}"}) as client:
            server.wait_healthy(client)
            _create(client, WIDE, start, WIDE_ARMS)
            _create(client, SMALL, start, ("control", "cards"))
            per_day = len(wide_csv(start, 1, sources))
            step = max(1, PART_BYTES // per_day)
            loading = time.perf_counter()
            for first in range(0, days, step):
                _put_csv(client, WIDE, wide_csv(start, min(step, days - first), sources,
                                                first_day=first))
            load_s = time.perf_counter() - loading
            log(f"  {rows:,} rows loaded in {load_s:.1f} s")
            small = wide_csv(start, days, 4).decode()
            small_lines = [small.splitlines()[0]] + [
                line for line in small.splitlines()[1:] if line.split(",")[1] in ("control",
                                                                                  "cards")]
            _put_csv(client, SMALL, ("\n".join(small_lines) + "\n").encode())
            small_day = wide_csv(start, 1, 4, seed=13, first_day=days - 1).decode()
            small_day_body = ("\n".join([small_day.splitlines()[0]] + [
                line for line in small_day.splitlines()[1:]
                if line.split(",")[1] in ("control", "cards")]) + "\n").encode()

            seeds = iter(range(100, 10_000))

            def reupload() -> Any:
                return _put_csv(client, WIDE, wide_csv(start, 1, sources, seed=next(seeds),
                                                       first_day=days - 1))

            figures: dict[str, Any] = {"rows": rows, "days": days, "sources": sources,
                                       "load_s": round(load_s, 2)}
            reupload()  # warm
            figures["reupload"] = _median(reupload, repeats)
            figures["other_upload_alone"] = _median(
                lambda: _put_csv(client, SMALL, small_day_body), repeats)
            figures["other_upload_during"] = _other_during(server, reupload, small_day_body,
                                                           repeats)
            page = f"/experiments/{WIDE}"
            reupload()  # a new diagnosis: the page's first view draws its charts
            figures["status_page_first"] = _median(lambda: _check(client.get(page), (200,)), 1)
            figures["status_page"] = _median(lambda: _check(client.get(page), (200,)), repeats)
            body = {"metric": "routes_saved"}
            figures["reweight"] = _median(lambda: _check(client.post(
                f"/v1/experiments/{WIDE}/reweight", json=body), (200,)), repeats)
            figures["series"] = _median(lambda: _check(client.get(
                f"/v1/experiments/{WIDE}/series"), (200,)), repeats)
            for kind, accept in (("csv_export", "text/csv"), ("json_export", "application/json")):
                figures.update(_export(client, server, kind, accept))
            log("  " + ", ".join(f"{k} {v:.3f}" if isinstance(v, float) else f"{k} {v}"
                                 for k, v in figures.items()))
            return figures
    finally:
        server.stop()


def _other_during(server: Server, reupload: Callable[[], Any], body: bytes,
                  repeats: int) -> float:
    """The small experiment's upload latency, sent 50 ms into the wide one's re-upload."""
    import httpx

    timings = []
    with httpx.Client(base_url=server.base, timeout=600.0,
                      headers={"Authorization": f"Bearer {server.token}"}) as other, \
            concurrent.futures.ThreadPoolExecutor(1) as pool:
        for _ in range(repeats):
            running = pool.submit(reupload)
            time.sleep(0.05)
            started = time.perf_counter()
            _put_csv(other, SMALL, body)
            timings.append(time.perf_counter() - started)
            running.result()
    return statistics.median(timings)


def _export(client: Any, server: Server, kind: str, accept: str) -> dict[str, Any]:
    pid = server.process.pid
    before = _rss_kib(pid, "VmRSS")
    _reset_peak(pid)
    started = time.perf_counter()
    size = 0
    with client.stream("GET", f"/v1/experiments/{WIDE}/observations",
                       headers={"Accept": accept}) as response:
        if response.status_code != 200:
            raise RuntimeError(f"{kind}: {response.status_code}")
        for part in response.iter_bytes():
            size += len(part)
    elapsed = time.perf_counter() - started
    peak = _rss_kib(pid, "VmHWM")
    return {kind: elapsed, f"{kind}_bytes": size, f"{kind}_rss_before_mib": round(before / 1024, 1),
            f"{kind}_peak_rss_mib": round(peak / 1024, 1)}


def run(sizes: list[tuple[int, int]], repeats: int, postgres: bool,
        log: Callable[[str], None] = print) -> dict[str, Any]:
    results: dict[str, Any] = {}
    before = cpu_times()
    with tempfile.TemporaryDirectory(prefix="inrush-wide-") as tmp:
        for days, sources in sizes:
            workdir = Path(tmp) / f"sqlite-{days}x{sources}"
            workdir.mkdir()
            log(f"sqlite {days} days x {sources} sources")
            results.setdefault("sqlite", []).append(measure_size(
                f"sqlite:///{workdir / 'wide.db'}", days, sources, repeats, workdir, log))
        if postgres:
            for days, sources in sizes:
                with postgres_database() as (url, reason):
                    if url is None:
                        results["postgresql"] = f"not run: {reason}"
                        break
                    workdir = Path(tmp) / f"pg-{days}x{sources}"
                    workdir.mkdir()
                    log(f"postgresql {days} days x {sources} sources")
                    results.setdefault("postgresql", []).append(measure_size(
                        url, days, sources, repeats, workdir, log))
    results["steal_share"] = steal_share(before, cpu_times())
    results["load_average_at_end"] = round(os.getloadavg()[0], 1)
    results["repeats"] = repeats
    return results


NOTES = [
    "What changed for these figures: the diagnosis after a write runs outside the write lock "
    "(`service.analysis.rediagnose`), the observation table is kept per data version and "
    "advanced by each upload's cells instead of being read back (`service.table_cache`), "
    "upserts count replaced rows from the staged side, the status page's charts are drawn "
    "once per stored series with the smaller sources summed, exports stream a part at a "
    "time (peak memory flat: the export adds nothing measurable to the process), and the "
    "diagnosis and series documents are encoded by msgspec instead of the standard "
    "library's json (about a quarter of a wide re-upload's time went to encoding them three "
    "times: the JSON-safe copy, the entity tag and the database column).",
    "",
    "Where a re-upload's time goes (sampling profile of 15 one-day re-uploads at 730k rows, "
    "in-process): the upsert (staging the day's rows, counting the experiment's stored rows, "
    "the INSERT ... ON CONFLICT) about a fifth, the JSON documents about a quarter before "
    "msgspec, advancing the cached table (a copy of each metric's cube) and the detectors "
    "(per-source fits, PELT on engagement gaps, the anytime-valid tests) the rest. Each of "
    "these is linear in the experiment's cells. On SQLite a small upload to another "
    "experiment during a wide re-upload waits only for the re-upload's short write "
    "transactions (the upsert, then storing the result) and shares the one worker process "
    "and its interpreter lock with it; the diagnosis itself holds no lock. Runs made while "
    "other work shared the 2 cores are slower than on an idle machine by a factor the load "
    "average indicates; compare sizes within one run.",
    "",
    "Exports read the rows through one statement in key order: on PostgreSQL a server-side "
    "cursor whose plan is an index scan of the primary key with no sort (checked with "
    "EXPLAIN), on SQLite the same index. Where an export's exponent comes out slightly above "
    "1, its cost per row grew with the table; that has not been profiled further.",
]

_COLUMNS = (("reupload", "one-day re-upload"), ("other_upload_alone", "other exp. upload"),
            ("other_upload_during", "… during the re-upload"),
            ("status_page_first", "status page, first view"),
            ("status_page", "status page"),
            ("reweight", "reweight"), ("series", "series"), ("csv_export", "CSV export"),
            ("json_export", "JSON export"))


def _table(rows: list[dict[str, Any]]) -> list[str]:
    lines = ["| rows | days x sources | " + " | ".join(label for _, label in _COLUMNS)
             + " | CSV export peak RSS (before) | JSON export peak RSS (before) |",
             "|---" * (len(_COLUMNS) + 4) + "|"]
    for row in rows:
        cells = []
        for key, _ in _COLUMNS:
            goal = GOALS.get((key, row["rows"]))
            mark = "" if goal is None else (" ✓" if row[key] <= goal else f" ✗ (goal {goal} s)")
            cells.append(f"{row[key]:.3f} s{mark}")
        lines.append(
            f"| {row['rows']:,} | {row['days']} x {row['sources']} | " + " | ".join(cells)
            + f" | {row['csv_export_peak_rss_mib']} MiB ({row['csv_export_rss_before_mib']})"
            + f" | {row['json_export_peak_rss_mib']} MiB ({row['json_export_rss_before_mib']}) |")
    return lines


def _verdicts(results: dict[str, Any]) -> list[str]:
    """The goals met or missed, and how each operation grows against the number of rows."""
    lines = []
    for backend in ("sqlite", "postgresql"):
        found = results.get(backend)
        if not isinstance(found, list) or not found:
            continue
        by_rows = {row["rows"]: row for row in found}
        verdicts = [f"{key.replace('_', ' ')} at {rows:,} rows {by_rows[rows][key]:.2f} s "
                    f"({'met' if by_rows[rows][key] <= goal else 'missed'}, goal {goal} s)"
                    for (key, rows), goal in GOALS.items() if rows in by_rows]
        if verdicts:
            lines.append(f"Goals on {backend}: " + "; ".join(verdicts) + ".")
        if len(found) >= 3:
            # The slope of log(time) against log(rows) over every size: 1 is linear. Less
            # sensitive to one noisy size than a ratio of two, and the fixed cost per request
            # pulls it below 1 at the small sizes.
            rows = np.log([r["rows"] for r in found])
            slopes = ", ".join(
                f"{label} {np.polyfit(rows, np.log([r[key] for r in found]), 1)[0]:.2f}"
                for key, label in _COLUMNS if all(r[key] > 0 for r in found))
            lines.append(f"Cost exponent on {backend} (slope of log time against log rows over "
                         f"the {len(found)} sizes; 1 = linear): {slopes}.")
        lines.append("")
    return lines[:-1]


def write(results: dict[str, Any]) -> None:
    lines = [START, "## Wide experiments: cost per request over experiment size", "",
             "Command: `python -m benchmarks.wide_bench` (module docstring: what each figure "
             "is). Rows are days x 4 arms x sources, 3 metrics each; one `inrush serve` worker "
             "on the loopback address; median of "
             f"{results['repeats']} requests, everything warm (the table cache of "
             "`service.table_cache` holds the experiment). Goals are marked ✓/✗.", ""]
    for backend in ("sqlite", "postgresql"):
        found = results.get(backend)
        if found is None:
            continue
        lines += [f"### {backend}", ""]
        lines += [found] if isinstance(found, str) else _table(found)
        lines.append("")
    steal = results.get("steal_share")
    if steal is not None:
        lines.append(f"CPU time taken by the hypervisor meanwhile (steal): {100 * steal:.1f}%.")
    load = results.get("load_average_at_end")
    if load is not None:
        lines.append(f"Load average (1 min) at the end of the run: {load} on 2 cores.")
    lines += ["", *_verdicts(results), "", *NOTES]
    lines.append(END)
    write_section(START, END, lines, {"wide": results})


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.wide_bench")
    parser.add_argument("--sizes", default=",".join(f"{d}x{s}" for d, s in DEFAULT_SIZES),
                        help="DAYSxSOURCES,... (4 arms, 3 metrics each)")
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--postgres", action="store_true", help="also on PostgreSQL")
    parser.add_argument("--no-write", action="store_true", help="print only")
    args = parser.parse_args(argv)
    sizes = [(int(d), int(s)) for d, s in (item.split("x") for item in args.sizes.split(","))]
    os.environ.setdefault("INRUSH_NOTIFY_WORKER", "0")
    results = run(sizes, args.repeats, args.postgres)
    if not args.no_write:
        write(results)
    print(json.dumps(results, indent=2))


if __name__ == "__main__":
    main()
