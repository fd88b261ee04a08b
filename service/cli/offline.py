"""``inrush analyze`` and ``inrush reweight``: the detectors on a CSV file, no server."""

from __future__ import annotations

import argparse
import datetime as dt
import json
import sys
from pathlib import Path
from typing import Any

from detectors import AllocationSchedule, InputError, ObservationTable, diagnose, reweight
from detectors.contamination import (
    ContaminatedCell,
    cells_from_document,
    cells_from_episodes,
    incident_impact,
)
from detectors.honest import UNCONTAMINATED, attach_bounds, default_effect, honest_effect

from ..csvio import read_observations_csv
from ..traffic import DEFAULT_SENSITIVITY_DAYS, ArmTraffic, sensitivity_document
from . import EXIT_BAD_INPUT, EXIT_OK
from .report import format_diagnosis, format_reweighting


def register(subparsers: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    analyze = subparsers.add_parser(
        "analyze", help="diagnose a CSV of daily per-arm, per-source entries",
        description="Run the SRM, window scan, source and changepoint tests on a CSV file.")
    _common(analyze)
    analyze.set_defaults(handler=run_analyze)

    rew = subparsers.add_parser(
        "reweight", help="naive and cohort re-weighted effect estimates from a CSV",
        description="Post-stratify a metric over entry cohorts and compare with the naive gap.")
    _common(rew)
    rew.add_argument("--metric", required=True, help="metric name (columns NAME.n, .sum, .sum_sq)")
    rew.add_argument("--target", default=None,
                     choices=["reference_arm", "pooled_unflagged", "uncontaminated"],
                     help="cohort mix to re-weight to (default: the honest estimate, "
                     "'uncontaminated', without the flagged cells)")
    rew.add_argument("--cohort-weights", type=Path, metavar="FILE.json",
                     help='custom target: a JSON object {"cohort": weight, ...} (cohort names '
                     "as in the output, e.g. organic or organic|flagged with --by source,window)")
    rew.add_argument("--by", default=None, choices=["source", "source,window"],
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
    return EXIT_OK


def run_reweight(args: argparse.Namespace) -> int:
    """Without options the honest estimate (as the service's default); ``--target``,
    ``--cohort-weights``, ``--by`` or exclusions re-weight as asked. Bounds and the impact of
    the flagged cells are printed either way."""
    try:
        table, schedule = _load(args)
        exclude_dates = [_parse_date(d, "--exclude-dates")
                         for d in args.exclude_dates.split(",") if d.strip()]
        exclude_sources = [s.strip() for s in args.exclude_sources.split(",") if s.strip()]
        weights = _cohort_weights(args.cohort_weights) if args.cohort_weights else None
        if weights is not None and args.target is not None:
            raise InputError("--cohort-weights sets a custom target; leave out --target",
                             field="--cohort-weights")
        diagnosis = diagnose(table, schedule)
        cells = cells_from_document(diagnosis.to_dict())
        explicit = (args.target is not None or weights is not None or args.by is not None
                    or exclude_dates or exclude_sources)
        if not explicit:
            document = default_effect(table, args.metric, cells, schedule)
        elif args.target == UNCONTAMINATED:
            if args.by is not None or exclude_dates or exclude_sources:
                raise InputError("--target uncontaminated chooses its own cohorts: leave out "
                                 "--by and the exclusions", field="--target")
            document = honest_effect(table, args.metric, cells, schedule).to_dict()
        else:
            target = "custom" if weights is not None else args.target or "reference_arm"
            result = reweight(table, args.metric, target=target, weights=weights,
                              by=tuple((args.by or "source").split(",")),
                              exclude_sources=exclude_sources, exclude_dates=exclude_dates,
                              flagged_dates=diagnosis.alert_days)
            document = attach_bounds(result, table, cells, schedule,
                                     exclude_sources=exclude_sources,
                                     exclude_dates=exclude_dates).to_dict()
        document["impact"] = _impacts(table, schedule, args.metric, diagnosis, cells)
    except InputError as error:
        return _bad_input(error)
    _print(document, args.json, format_reweighting)
    return EXIT_OK


def _cohort_weights(path: Path) -> dict[str, float]:
    """``{cohort: weight}`` from a JSON file; checked further by the re-weighting itself."""
    try:
        weights = json.loads(path.read_text(encoding="utf-8"))
    except OSError as error:
        raise InputError(f"cannot read {path}: {error.strerror or error}",
                         field="--cohort-weights") from None
    except (ValueError, UnicodeDecodeError) as error:
        raise InputError(f"{path} is not JSON: {error}", field="--cohort-weights") from None
    if not isinstance(weights, dict) or not weights:
        raise InputError(f'{path} must hold a JSON object {{"cohort": weight, ...}}',
                         field="--cohort-weights")
    return weights


def _impacts(table: ObservationTable, schedule: AllocationSchedule, metric: str,
             diagnosis: Any, cells: tuple[ContaminatedCell, ...]) -> list[dict[str, Any]]:
    """Impact of each incident (episode) on the metric; without episodes, of the flagged days
    together."""
    episodes = tuple(getattr(diagnosis, "episodes", ()) or ())
    groups = ([(f"{e.shape} into {e.arm} {e.start.isoformat()}..{e.end.isoformat()}",
                cells_from_episodes([e])) for e in episodes] if episodes
              else [("the alert-level flagged days", cells)] if cells else [])
    return [{"incident": name, **incident_impact(table, schedule, metric, group).to_dict()}
            for name, group in groups]


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
