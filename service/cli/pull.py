"""``inrush pull``: aggregate unit-level exposures into the daily cube inside the warehouse
that holds them, then write it to a CSV file, upload it to a running Inrush, or store it in the
local database."""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from . import EXIT_BAD_INPUT, EXIT_FAILURE, EXIT_OK

if TYPE_CHECKING:  # the command line loads this module for --help: nothing heavy at import
    from detectors.errors import InputError


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    pull = subparsers.add_parser(
        "pull", help="aggregate unit-level exposures into the daily cube in DuckDB, "
                     "PostgreSQL or Spark",
        description="Run the first-exposure aggregation inside the engine named by the "
                    "config's [warehouse] url and deliver the daily per-arm, per-source cube. "
                    "Units exposed to more than one arm are left out and reported. Exit "
                    "status 2 for a config or data problem (the message names the key or "
                    "column), 1 when the delivery failed; nothing partial is written.")
    pull.add_argument("config", type=Path, help="TOML file: [warehouse], [exposures], "
                                                "[[metrics]]")
    pull.add_argument("--as-of", metavar="DATE",
                      help="last day to include, in the config's time zone (default: "
                           "yesterday there); metric windows must close by its end")
    where = pull.add_mutually_exclusive_group(required=True)
    where.add_argument("--output", metavar="FILE",
                       help="write the cube as observation CSV ('-' for standard output)")
    where.add_argument("--upload", action="store_true",
                       help="PUT the cube to a running Inrush (--url, --token, --experiment)")
    where.add_argument("--store", action="store_true",
                       help="write into the database named by INRUSH_DATABASE_URL, through "
                            "the service's own validation (needs --experiment)")
    pull.add_argument("--experiment", metavar="ID", help="experiment to upload or store to")
    pull.add_argument("--url", default=os.environ.get("INRUSH_URL", "http://127.0.0.1:8000"),
                      help="base URL of the service (default: $INRUSH_URL or "
                           "http://127.0.0.1:8000)")
    pull.add_argument("--token", default=None,
                      help="bearer token with write scope (default: $INRUSH_TOKEN)")
    pull.add_argument("--json", action="store_true",
                      help="print the pull's report as JSON instead of text")
    pull.set_defaults(handler=run_pull_command)


def run_pull_command(args: argparse.Namespace) -> int:
    from detectors.errors import InputError

    from ..warehouse.config import load_config
    from ..warehouse.deliver import UploadError, store, upload, write_csv
    from ..warehouse.pull import default_as_of, run_pull

    if (args.upload or args.store) and not args.experiment:
        print("inrush pull: --experiment is required with --upload and --store",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        config = load_config(args.config)
        as_of = _as_of(args.as_of) if args.as_of else default_as_of(config)
        result = run_pull(config, as_of)
        report = result.report()
        if args.output:
            text = write_csv(result.cube, None if args.output == "-" else Path(args.output))
            if args.output == "-":
                sys.stdout.write(text)
            report["delivered"] = {"output": args.output, "written": len(result.cube.rows)}
        elif args.upload:
            token = args.token or os.environ.get("INRUSH_TOKEN")
            done = upload(result.cube, url=args.url, token=token, experiment=args.experiment,
                          report=dict(report))
            report["delivered"] = {"url": args.url, "experiment": args.experiment,
                                   "written": done.written, "status": done.status}
            if "report_error" in done.detail:
                print(f"inrush pull: the cube was written but its report was not recorded: "
                      f"{done.detail['report_error']}", file=sys.stderr)
        else:
            from ..settings import Settings

            done = store(result.cube, database_url=Settings().database_url,
                         experiment=args.experiment)
            report["delivered"] = {"experiment": args.experiment, "written": done.written,
                                   "status": done.status}
    except InputError as error:
        return _bad_input(error)
    except UploadError as error:
        print(f"inrush pull: the upload failed, nothing was written: {error}",
              file=sys.stderr)
        for item in ((error.problem or {}).get("errors") or [])[:20]:
            print(f"  {item}", file=sys.stderr)
        return EXIT_FAILURE
    # With the cube on standard output, the report goes to standard error.
    stream = sys.stderr if args.output == "-" else sys.stdout
    if args.json:
        json.dump(report, stream, indent=2)
        stream.write("\n")
    else:
        stream.write(format_report(report))
    return EXIT_OK


def format_report(report: dict[str, Any]) -> str:
    lines = [f"Pulled on {report['engine']} as of {report['as_of']} "
             f"(exposures before {report['cutoff']}) in {report['seconds']:.1f} s:",
             f"  {report['units']} units, {report['rows']} rows, "
             f"{report['first_date']} to {report['last_date']}"]
    crossed = int(report["crossed_units"])  # type: ignore[arg-type]
    if crossed:
        share = crossed / max(1, crossed + int(report["units"]))  # type: ignore[arg-type]
        lines.append(f"  WARNING: {crossed} units ({share:.2%}) were exposed to more than one "
                     "arm and are left out. Crossing is a known cause of sample ratio "
                     "mismatch: check the assignment and logging. Largest cells:")
        largest = sorted(report["crossed"], key=lambda c: -c["units"])[:5]  # type: ignore[arg-type]
        lines += [f"    {c['date']} {c['source']}: {c['units']}" for c in largest]
    empty = report["empty_days"]
    if empty:
        lines.append(f"  WARNING: no exposures at all on {', '.join(empty[:10])}"  # type: ignore[index]
                     f"{' ...' if len(empty) > 10 else ''}: a logging gap reads as a day "  # type: ignore[arg-type]
                     "without traffic")
    delivered = report.get("delivered") or {}
    if "output" in delivered:
        lines.append(f"  wrote {delivered['written']} rows to {delivered['output']}")
    elif delivered:
        lines.append(f"  wrote {delivered['written']} rows to experiment "
                     f"{delivered['experiment']}; its status is now {delivered['status']}")
    return "\n".join(lines) + "\n"


def _as_of(text: str) -> dt.date:
    from detectors.errors import InputError

    try:
        return dt.date.fromisoformat(text.strip())
    except ValueError:
        raise InputError(f"{text!r} is not an ISO date (YYYY-MM-DD)", field="--as-of"
                         ) from None


def _bad_input(error: InputError) -> int:
    print("inrush pull: nothing was written:", file=sys.stderr)
    for problem in error.problems[:50]:
        where = f"row {problem.row}: " if problem.row is not None else ""
        print(f"  {where}{problem.field}: {problem.message}", file=sys.stderr)
    return EXIT_BAD_INPUT


def feed_demo(client: Any) -> None:
    """``inrush demo --pull``: create the demo experiment on the server behind ``client`` and
    upload the cube pulled from the demo's Parquet logs as of its last day."""
    from ..demo import scenario, units
    from ..warehouse.config import load_config
    from ..warehouse.deliver import upload_with
    from ..warehouse.pull import run_pull

    response = client.post("/v1/experiments", json={
        "id": scenario.EXPERIMENT_ID, "title": scenario.TITLE,
        "start_date": scenario.START.isoformat(), "arms": list(scenario.ARMS),
        "allocation": [{"from": scenario.START.isoformat(), "weights": [0.5, 0.5]}]})
    response.raise_for_status()
    as_of = scenario.START + dt.timedelta(days=scenario.DAYS - 1)
    print(f"$ inrush pull {units.CONFIG_PATH} --as-of {as_of} --upload "
          f"--experiment {scenario.EXPERIMENT_ID}\n")
    result = run_pull(load_config(units.CONFIG_PATH), as_of)
    report = result.report()
    done = upload_with(client, result.cube, experiment=scenario.EXPERIMENT_ID,
                       report=dict(report))
    report["delivered"] = {"experiment": scenario.EXPERIMENT_ID, "written": done.written,
                           "status": done.status}
    print(format_report(report))
