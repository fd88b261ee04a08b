"""``inrush demo``: the invented Larkspur Trails scenario, end to end on embedded SQLite."""

from __future__ import annotations

import argparse
import contextlib
import io
import os
import secrets
import socket
import subprocess
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from . import EXIT_FAILURE, EXIT_OK
from .report import format_diagnosis, format_reweighting, labelled, paragraph

if TYPE_CHECKING:  # httpx, pandas and the scenario load when the demo runs, not for --help
    import httpx


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    demo = subparsers.add_parser(
        "demo", help="run the invented demo scenario against a local server",
        description="Start Inrush on SQLite, upload the demo experiment day by day and print "
                    "what its owner would see.")
    demo.add_argument("--port", type=int, default=8000,
                      help="port (default 8000, or a free one when 8000 is taken)")
    demo.add_argument("--database", type=Path, default=Path("inrush-demo.db"),
                      help="SQLite file for the demo (recreated each run)")
    demo.add_argument("--no-serve", action="store_true", help="exit after the printout")
    demo.add_argument("--offline", action="store_true",
                      help="no server: run `inrush analyze` and `inrush reweight` on the CSV")
    demo.add_argument("--pull", action="store_true",
                      help="feed the server with `inrush pull` from the demo's unit-level "
                           "Parquet logs instead of the daily CSV")
    demo.set_defaults(handler=run_demo)


def run_demo(args: argparse.Namespace) -> int:
    if args.offline:
        return _offline()
    return _online(args)


def _offline() -> int:
    from ..demo import scenario
    from . import main

    csv = str(scenario.CSV_PATH)
    arms = ",".join(scenario.ARMS)
    print(f"$ inrush analyze {csv} --arms {arms}\n")
    status = main(["analyze", csv, "--arms", arms])
    if status:
        return status
    print(f"\n$ inrush reweight {csv} --arms {arms} --metric routes_saved --by source,window\n")
    return main(["reweight", csv, "--arms", arms, "--metric", "routes_saved",
                 "--by", "source,window"])


def _port(wanted: int) -> int:
    """``wanted`` when it can be bound on loopback, else a free port."""
    for candidate in (wanted, 0):
        with contextlib.closing(socket.socket(socket.AF_INET, socket.SOCK_STREAM)) as sock:
            try:
                sock.bind(("127.0.0.1", candidate))
            except OSError:
                continue
            return int(sock.getsockname()[1])
    raise OSError("no free port on 127.0.0.1")


def _online(args: argparse.Namespace) -> int:
    import httpx

    port = _port(args.port)
    base = f"http://127.0.0.1:{port}"
    for suffix in ("", "-wal", "-shm"):
        Path(f"{args.database}{suffix}").unlink(missing_ok=True)
    token = secrets.token_urlsafe(24)
    env = {**os.environ, "INRUSH_DATABASE_URL": f"sqlite:///{args.database.resolve()}",
           "INRUSH_ADMIN_TOKEN": token, "INRUSH_PUBLIC_URL": base}
    server = subprocess.Popen(
        [sys.executable, "-m", "service.cli", "serve", "--host", "127.0.0.1",
         "--port", str(port), "--log-level", "warning"], env=env)
    try:
        client = httpx.Client(base_url=base, timeout=30.0,
                              headers={"Authorization": f"Bearer {token}"})
        if not _wait_healthy(client, server):
            print("inrush demo: the server did not start", file=sys.stderr)
            return EXIT_FAILURE
        if args.pull:
            from .pull import feed_demo

            feed_demo(client)
        else:
            _upload(client)
        _show(client)
        if args.no_serve:
            print("\n" + "\n".join(paragraph(
                "The demo server has stopped (--no-serve). Run `inrush demo` without "
                "--no-serve to keep it running and browse the status page.", indent="")))
            return EXIT_OK
        _poll_these(base, token)
        print("\nServing until Ctrl-C.")
        server.wait()
        return EXIT_OK
    except KeyboardInterrupt:
        return EXIT_OK
    except httpx.HTTPError as error:
        print(f"inrush demo: {error}", file=sys.stderr)
        return EXIT_FAILURE
    finally:
        if server.poll() is None:
            server.terminate()
            with contextlib.suppress(subprocess.TimeoutExpired):
                server.wait(timeout=10)


def _wait_healthy(client: httpx.Client, server: subprocess.Popen[bytes]) -> bool:
    import httpx

    deadline = time.monotonic() + 60
    while time.monotonic() < deadline:
        if server.poll() is not None:
            return False
        with contextlib.suppress(httpx.HTTPError):
            if client.get("/healthz").status_code == 200:
                return True
        time.sleep(0.2)
    return False


def _check(response: httpx.Response) -> dict[str, Any]:
    import httpx

    if response.status_code >= 400:
        raise httpx.HTTPStatusError(f"{response.request.method} {response.request.url} -> "
                                    f"{response.status_code}: {response.text}",
                                    request=response.request, response=response)
    return response.json() if response.content else {}


def _upload(client: httpx.Client) -> None:
    import pandas as pd

    from ..demo import scenario

    _check(client.post("/v1/experiments", json={
        "id": scenario.EXPERIMENT_ID, "title": scenario.TITLE,
        "start_date": scenario.START.isoformat(), "arms": list(scenario.ARMS),
        "allocation": [{"from": scenario.START.isoformat(), "weights": [0.5, 0.5]}],
    }))
    frame = pd.read_csv(scenario.CSV_PATH, dtype=str, keep_default_na=False)
    days = frame.groupby("date", sort=True)
    print(f"Uploading {days.ngroups} days of {scenario.EXPERIMENT_ID} one day at a time, as "
          "a nightly export would:")
    progress = sys.stdout.isatty()
    statuses: list[tuple[str, str]] = []  # (date, status after that upload)
    for number, (date, day) in enumerate(days, start=1):
        buffer = io.StringIO()
        day.to_csv(buffer, index=False)
        answer = _check(client.put(f"/v1/experiments/{scenario.EXPERIMENT_ID}/observations",
                                   content=buffer.getvalue(),
                                   headers={"Content-Type": "text/csv"}))
        statuses.append((str(date), str(answer.get("diagnosis", {}).get("status"))))
        if progress:
            print(f"\r  upload {number:>2}/{days.ngroups}  {date}  "
                  f"{answer.get('written')} rows  status {statuses[-1][1]:<8}", end="",
                  flush=True)
    if progress:
        print("\r" + " " * 60 + "\r", end="")
    print("\n".join(paragraph(f"{len(statuses)} uploads, {len(frame):,} rows; status "
                             + ", ".join(_status_runs(statuses)) + ".")) + "\n")


def _status_runs(statuses: list[tuple[str, str]]) -> list[str]:
    """``healthy after 2026-10-26 to 2026-11-08``-style runs of equal status."""
    runs: list[list[str]] = []
    for date, status in statuses:
        if runs and runs[-1][0] == status:
            runs[-1][2] = date
        else:
            runs.append([status, date, date])
    return [f"{status} after the upload of {first}" if first == last
            else f"{status} after the uploads of {first} to {last}"
            for status, first, last in runs]


def _show(client: httpx.Client) -> None:
    """The sections ``inrush demo --offline`` prints (diagnosis with sensitivity, then the
    re-weighting), read from the API, with the alert history between them."""
    from ..demo import scenario

    experiment = scenario.EXPERIMENT_ID
    diagnosis = _check(client.get(f"/v1/experiments/{experiment}/diagnosis"))
    diagnosis["sensitivity"] = _check(client.get(f"/v1/experiments/{experiment}/sensitivity"))
    print(format_diagnosis(diagnosis))
    alerts = _check(client.get("/v1/alerts", params={"experiment": experiment}))
    items = alerts.get("items", [])
    open_items = [a for a in items if a["status"] == "open"]
    print(f"Alert history: {len(items)} alerts, {len(open_items)} open")
    for alert in items[:12]:
        print("\n".join(labelled(alert["status"], alert["title"])))
    reweighting = _check(client.post(f"/v1/experiments/{experiment}/reweight", json={
        "metric": "routes_saved", "target": "reference_arm", "by": ["source", "window"]}))
    print()
    print(format_reweighting(reweighting), end="")


def _poll_these(base: str, token: str) -> None:
    from ..demo import scenario

    experiment = scenario.EXPERIMENT_ID
    print("\nPoll these (Authorization: Bearer <token>):")
    for path in (f"/v1/experiments/{experiment}/diagnosis",
                 f"/v1/experiments/{experiment}/series", "/v1/alerts",
                 f"/experiments/{experiment}", "/metrics"):
        print(f"  {base}{path}")
    print(f"Demo admin token: {token}")
