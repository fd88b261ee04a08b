"""``inrush analyze`` and ``inrush reweight``: the detectors on a CSV file, no server."""

from __future__ import annotations

import argparse
import datetime as dt
import json
import sys
from pathlib import Path
from typing import Any

from detectors import AllocationSchedule, InputError, ObservationTable, diagnose, reweight

from ..csvio import read_observations_csv
from ..traffic import DEFAULT_SENSITIVITY_DAYS, ArmTraffic, sensitivity_document
from . import EXIT_BAD_INPUT, EXIT_OK
from .report import format_diagnosis, format_reweighting


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    analyze = subparsers.add_parser(
        "analyze", help="diagnose a CSV of daily per-arm, per-source entries",
        description="Run the SRM, window scan, source and changepoint tests on a CSV file.")
    _common(analyze)
    analyze.add_argument("--html", type=Path, metavar="FILE",
                         help="also write a self-contained HTML report with charts to FILE")
    analyze.set_defaults(handler=run_analyze)

    rew = subparsers.add_parser(
        "reweight", help="naive and cohort re-weighted effect estimates from a CSV",
        description="Post-stratify a metric over entry cohorts and compare with the naive gap.")
    _common(rew)
    rew.add_argument("--metric", required=True, help="metric name (columns NAME.n, .sum, .sum_sq)")
    rew.add_argument("--target", default="reference_arm",
                     choices=["reference_arm", "pooled_unflagged"],
                     help="cohort mix to re-weight to (default: the reference arm's)")
    rew.add_argument("--by", default="source", choices=["source", "source,window"],
                     help="cohorts: entry source, or source x flagged/unflagged days")
    rew.add_argument("--exclude-sources", default="", help="comma-separated sources to drop")
    rew.add_argument("--exclude-dates", default="", help="comma-separated ISO dates to drop")
    rew.set_defaults(handler=run_reweight)


def _common(parser: argparse.ArgumentParser) -> None:
    parser.add_argument("file", type=Path, help="CSV: date,arm,source,entered[,NAME.n,...]")
    parser.add_argument("--arms", required=True,
                        help="comma-separated arm names, reference arm first")
    parser.add_argument("--weights", help="planned weights in arm order (default: equal)")
    parser.add_argument("--start", help="experiment start date (default: first date in file)")
    parser.add_argument("--json", action="store_true", help="print the JSON document")


def _load(args: argparse.Namespace) -> tuple[ObservationTable, AllocationSchedule]:
    arms = [a.strip() for a in args.arms.split(",") if a.strip()]
    start = _parse_date(args.start, "--start") if args.start else None
    try:
        weights = ([float(w) for w in args.weights.split(",")] if args.weights else None)
    except ValueError:
        raise InputError("--weights must be numbers separated by commas", field="--weights"
                         ) from None
    if not args.file.is_file():
        raise InputError(f"no such file: {args.file}", field="file")
    frame = read_observations_csv(args.file)
    schedule = AllocationSchedule.constant(arms, weights, start or dt.date.min)
    table = ObservationTable.from_frame(frame, arms, start=start)
    return table, schedule


def run_analyze(args: argparse.Namespace) -> int:
    try:
        table, schedule = _load(args)
        result = diagnose(table, schedule, experiment=args.file.stem)
        document = result.to_dict()
        traffic = ArmTraffic.from_table(table, schedule)
        if traffic is not None:  # the smallest inflow over 2 days these thresholds would flag
            document["sensitivity"] = sensitivity_document(
                traffic, days=DEFAULT_SENSITIVITY_DAYS, alpha=result.config.scan_alpha,
                max_window=result.config.max_window)
    except InputError as error:
        return _bad_input(error)
    _print(document, args.json, lambda doc: format_diagnosis(doc, result))
    if args.html is not None:
        return _write_html(args.html, table, schedule, result, document, args.file.stem)
    return EXIT_OK


def _write_html(path: Path, table: ObservationTable, schedule: AllocationSchedule,
                result: Any, document: dict[str, Any], name: str) -> int:
    from ..pages.report_html import analysis_report, write_report

    try:
        write_report(path, analysis_report(table, schedule, result, document, name=name))
    except OSError as error:
        print(f"inrush: cannot write the HTML report to {path}: {error.strerror or error}",
              file=sys.stderr)
        return EXIT_BAD_INPUT
    print(f"inrush: HTML report written to {path}", file=sys.stderr)
    return EXIT_OK


def run_reweight(args: argparse.Namespace) -> int:
    try:
        table, schedule = _load(args)
        exclude_dates = [_parse_date(d, "--exclude-dates")
                         for d in args.exclude_dates.split(",") if d.strip()]
        exclude_sources = [s.strip() for s in args.exclude_sources.split(",") if s.strip()]
        flagged = diagnose(table, schedule).alert_days
        result = reweight(table, args.metric, target=args.target, by=tuple(args.by.split(",")),
                          exclude_sources=exclude_sources, exclude_dates=exclude_dates,
                          flagged_dates=flagged)
    except InputError as error:
        return _bad_input(error)
    _print(result.to_dict(), args.json, format_reweighting)
    return EXIT_OK


def _parse_date(text: str, field: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text.strip())
    except ValueError:
        raise InputError(f"{text!r} is not an ISO date (YYYY-MM-DD)", field=field) from None


def _print(document: dict[str, Any], as_json: bool, formatter: Any) -> None:
    if as_json:
        json.dump(document, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(formatter(document))


def _bad_input(error: InputError) -> int:
    print("inrush: the input cannot be analysed:", file=sys.stderr)
    for problem in error.problems[:50]:
        where = (f"data row {problem.row + 1} (line {problem.row + 2}): "
                 if problem.row is not None else "")
        print(f"  {where}{problem.field}: {problem.message}", file=sys.stderr)
    if len(error.problems) > 50:
        print(f"  ... and {len(error.problems) - 50} more", file=sys.stderr)
    return EXIT_BAD_INPUT
