"""The service benchmarks of two revisions, measured alternately in one session.

On a shared virtual machine the CPU a run gets varies from hour to hour (``benchmarks.run``
records the hypervisor's ``steal`` share), so a figure from yesterday and one from today do not
compare. This runs the same client measurements as ``benchmarks.http`` (ingest, polling,
re-analysis, smaller counts) against servers started from two source trees, alternating:
``--baseline REV`` (checked out with ``git worktree`` into a temporary folder) and the working
tree. The client side is always this tree's code; only the server differs.

    python -m benchmarks.compare_revisions --baseline afbea56 [--backend sqlite|postgresql]
        [--rounds 2] [--markdown]
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import shutil
import statistics
import subprocess
import tempfile
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Any

from . import http as http_bench

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
MEASURES = ("ingest_csv_rows_per_s", "ingest_json_rows_per_s", "poll_requests_per_s",
            "poll_p99_ms", "reanalysis_s_per_1000")


@contextlib.contextmanager
def worktree(revision: str) -> Iterator[Path]:
    folder = Path(tempfile.mkdtemp(prefix="inrush-baseline-"))
    subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", str(folder),
                    revision], check=True, capture_output=True)
    try:
        yield folder
    finally:
        subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(folder)],
                       check=False, capture_output=True)
        shutil.rmtree(folder, ignore_errors=True)


@contextlib.contextmanager
def _database(backend: str, workdir: Path) -> Iterator[str]:
    if backend == "sqlite":
        yield f"sqlite:///{workdir / 'compare.db'}"
        return
    with http_bench.postgres_database() as (url, reason):
        if url is None:
            raise SystemExit(f"PostgreSQL: {reason}")
        yield url


def measure(tree: Path, backend: str, experiments: int = 200) -> dict[str, float]:
    """One round against a server whose code comes from ``tree``."""
    import httpx

    wrk, how = http_bench.find_wrk(allow_install=False)
    if wrk is None:
        raise SystemExit(how)
    workdir = Path(tempfile.mkdtemp(prefix="inrush-compare-"))
    previous = os.environ.get("PYTHONPATH")
    os.environ["PYTHONPATH"] = str(tree)  # the server process imports this tree's code
    try:
        with _database(backend, workdir) as url:
            server = http_bench.Server(url, workdir)
            try:
                client = httpx.Client(base_url=server.base, timeout=120,
                                      headers={"Authorization": f"Bearer {server.token}"})
                server.wait_healthy(client)
                quiet = lambda _: None  # noqa: E731
                ingest = http_bench.ingest(client, 2, quiet)
                poll = http_bench.poll(client, server, wrk, 10, 16, quiet)
                again = http_bench.reanalysis(server.base, server.token, experiments, quiet)
                client.close()
            finally:
                server.stop()
    finally:
        if previous is None:
            os.environ.pop("PYTHONPATH", None)
        else:
            os.environ["PYTHONPATH"] = previous
        shutil.rmtree(workdir, ignore_errors=True)
    return {"ingest_csv_rows_per_s": ingest["csv"]["rows_per_s_median"],
            "ingest_json_rows_per_s": ingest["json"]["rows_per_s_median"],
            "poll_requests_per_s": poll["requests_per_s"], "poll_p99_ms": poll["p99_ms"],
            "reanalysis_s_per_1000": again["seconds_per_1000"]}


def compare(baseline: str, backend: str, rounds: int) -> dict[str, Any]:
    results: dict[str, list[dict[str, float]]] = {"baseline": [], "current": []}
    with worktree(baseline) as old:
        for _ in range(rounds):  # alternate, so that both see the same machine
            results["baseline"].append(measure(old, backend))
            results["current"].append(measure(ROOT, backend))
    medians = {side: {m: statistics.median(r[m] for r in runs) for m in MEASURES}
               for side, runs in results.items()}
    return {"baseline": baseline, "backend": backend, "rounds": rounds, "medians": medians,
            "runs": results}


def markdown(result: dict[str, Any]) -> str:
    base, now = result["medians"]["baseline"], result["medians"]["current"]
    lines = [f"| {result['backend']} | `{result['baseline']}` | this revision | ratio |",
             "|---|---|---|---|"]
    for name in MEASURES:
        ratio = now[name] / base[name] if base[name] else float("nan")
        lines.append(f"| {name} | {base[name]:,.1f} | {now[name]:,.1f} | {ratio:.2f} |")
    return "\n".join(lines)


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m benchmarks.compare_revisions",
                                     description=__doc__.split("\n\n")[0])
    parser.add_argument("--baseline", required=True, help="git revision to compare against")
    parser.add_argument("--backend", choices=["sqlite", "postgresql"], default="sqlite")
    parser.add_argument("--rounds", type=int, default=2)
    parser.add_argument("--markdown", action="store_true", help="print a table, not JSON")
    args = parser.parse_args(argv)
    result = compare(args.baseline, args.backend, args.rounds)
    print(markdown(result) if args.markdown else json.dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
