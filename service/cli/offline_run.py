"""The work of ``inrush analyze`` and ``inrush reweight``: read the CSV, trim it to the
requested days, check it, run the detectors and print the report (or the JSON document).

Imported only when one of these commands runs (it loads numpy, pandas and scipy). Problems
are printed grouped, each quoting the offending value with the fix
(:mod:`service.cli.problem_text`); with ``--json`` they are an RFC 9457 problem document.
Notes about the input that do not stop the analysis (rows left out by ``--start``/``--end``,
days without rows, a file without a source column, unused columns) go to standard error.
"""

from __future__ import annotations

import argparse
import datetime as dt
import difflib
import json
import re
import sys
import textwrap
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from detectors import AllocationSchedule, InputError, ObservationTable, diagnose, reweight
from detectors.contamination import (
    ContaminatedCell,
    cells_from_document,
    cells_from_episodes,
    impact_function,
    incident_impact,
)
from detectors.data import UNATTRIBUTED
from detectors.episodes import Episode
from detectors.honest import UNCONTAMINATED, attach_bounds, default_effect, honest_effect

from ..csvio import CsvInputError, read_csv_rows
from ..traffic import DEFAULT_SENSITIVITY_DAYS, ArmTraffic, sensitivity_document
from . import EXIT_BAD_INPUT, EXIT_OK
from .options import AnalysisOptions, OptionError, close_names, parse_options
from .problem_text import error_items, grouped_lines, problem_document, summary
from .report import format_diagnosis, format_reweighting, wrap_width

# Data-contract field names as the options that set them.
_OPTION_FIELDS = {"metric": "--metric", "target": "--target", "by": "--by",
                  "exclude_sources": "--exclude-sources", "exclude_dates": "--exclude-dates",
                  "arms": "--arms", "allocation": "--allocation", "weights": "--cohort-weights"}


class BadInputError(Exception):
    """Input problems as ``{row, line, field, message}`` items, ready to print."""

    def __init__(self, items: list[dict[str, Any]]) -> None:
        super().__init__(summary(items))
        self.items = items


@dataclass
class Loaded:
    """The checked input: the table, the schedule and what the analyst should know."""

    table: ObservationTable
    schedule: AllocationSchedule
    rows: int
    notes: list[str] = field(default_factory=list)


def analyze(args: argparse.Namespace) -> int:
    try:
        loaded = load(args)
        result = diagnose(loaded.table, loaded.schedule, experiment=args.file.stem,
                          impact=impact_function)
        document = result.to_dict()
        traffic = ArmTraffic.from_table(loaded.table, loaded.schedule)
        if traffic is not None:  # the smallest inflow over 2 days these thresholds would flag
            document["sensitivity"] = sensitivity_document(
                traffic, days=DEFAULT_SENSITIVITY_DAYS, alpha=result.config.scan_alpha,
                max_window=result.config.max_window)
    except BadInputError as error:
        return _bad_input(args, error.items)
    except InputError as error:
        return _bad_input(args, _option_items(error))
    _emit(args, loaded, document, format_diagnosis)
    if getattr(args, "html", None) is not None:
        return _write_html(args.html, loaded.table, loaded.schedule, result, document,
                           args.file.stem)
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


def reweight_file(args: argparse.Namespace) -> int:
    """Without options the honest estimate (as the service's default); ``--target``,
    ``--cohort-weights``, ``--by`` or exclusions re-weight as asked. Bounds and the impact of
    each incident are printed either way."""
    try:
        loaded = load(args)
        dates = [_exclude_date(d) for d in args.exclude_dates.split(",") if d.strip()]
        bad_dates = [d for d in dates if isinstance(d, str)]
        if bad_dates:
            raise BadInputError([_item("--exclude-dates", f"{d!r} is not a date; write it "
                                  "YYYY-MM-DD") for d in bad_dates])
        exclude_dates = [d for d in dates if isinstance(d, dt.date)]
        exclude_sources = [s.strip() for s in args.exclude_sources.split(",") if s.strip()]
        weights = _cohort_weights(args.cohort_weights) if args.cohort_weights else None
        if weights is not None and args.target is not None:
            raise BadInputError([_item("--cohort-weights", "sets a custom target; leave out "
                                       "--target")])
        table, schedule = loaded.table, loaded.schedule
        diagnosis = diagnose(table, schedule, impact=impact_function)
        cells = cells_from_document(diagnosis.to_dict())
        explicit = (args.target is not None or weights is not None or args.by is not None
                    or exclude_dates or exclude_sources)
        if not explicit:
            document = default_effect(table, args.metric, cells, schedule,
                                      incidents=len(diagnosis.episodes))
        elif args.target == UNCONTAMINATED:
            if args.by is not None or exclude_dates or exclude_sources:
                raise BadInputError([_item("--target", "uncontaminated chooses its own "
                                           "cohorts: leave out --by and the exclusions")])
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
        document["impact"] = _impacts(table, schedule, args.metric, diagnosis.episodes, cells)
    except BadInputError as error:
        return _bad_input(args, error.items)
    except InputError as error:
        return _bad_input(args, _option_items(error))
    _emit(args, loaded, document, format_reweighting)
    return EXIT_OK


def _cohort_weights(path: Path) -> dict[str, Any]:
    """``{cohort: weight}`` from a JSON file; the weights are checked by the re-weighting."""
    try:
        weights = json.loads(path.read_text(encoding="utf-8"))
    except OSError as error:
        raise BadInputError([_item("--cohort-weights", f"cannot read {path}: "
                                   f"{error.strerror or error}")]) from None
    except (ValueError, UnicodeDecodeError) as error:
        raise BadInputError([_item("--cohort-weights", f"{path} is not JSON: {error}")]
                            ) from None
    if not isinstance(weights, dict) or not weights:
        raise BadInputError([_item("--cohort-weights", f"{path} must hold a JSON object "
                                   '{"cohort": weight, ...}')])
    return weights


def _impacts(table: ObservationTable, schedule: AllocationSchedule, metric: str,
             episodes: Sequence[Episode], cells: Sequence[ContaminatedCell]
             ) -> list[dict[str, Any]]:
    """Impact of each incident (episode) on the metric; for a diagnosis without episodes, of
    its alert-level flagged days together."""
    groups = ([(f"{e.shape} into {e.arm} {e.start.isoformat()}..{e.end.isoformat()}",
                cells_from_episodes([e])) for e in episodes] if episodes
              else [("the alert-level flagged days", tuple(cells))] if cells else [])
    return [{"incident": name, **incident_impact(table, schedule, metric, group).to_dict()}
            for name, group in groups]


def load(args: argparse.Namespace) -> Loaded:
    """Options, file, trimming and validation; every problem found is raised as
    :class:`BadInputError`."""
    try:
        options = parse_options(args.arms, args.weights, args.allocation, args.start, args.end)
    except OptionError as error:
        raise BadInputError([_item(p.option, p.message) for p in error.problems]) from None
    path: Path = args.file
    if not path.is_file():
        raise BadInputError([_item("file", _missing_file(path))])
    try:
        rows = read_csv_rows(path)
    except CsvInputError as error:
        raise BadInputError(error_items(error.problems, error.lines)) from None
    notes: list[str] = []
    if rows.delimiter != ",":
        notes.append(f"read as {rows.delimiter_name}-separated.")
    notes += [re.sub(r"^unknown column ('.*?'|\".*?\"): ", r"column \1 is not used: ",
                     p.message).rstrip(".") + ("" if p.message.endswith("?") else ".")
              for p in rows.unused]
    frame, positions = _trimmed(rows.frame, options, notes)
    try:
        table = ObservationTable.from_frame(frame, options.arms, start=options.start)
    except InputError as error:
        items = error_items(error.problems, rows.lines[positions])
        arm_problems = any(item["field"] == "arm" for item in items)
        raise BadInputError((_absent_arms(frame, options.arms) if arm_problems else [])
                            + items) from None
    if "source" not in rows.frame.columns:
        notes.append(f"the file has no source column: every row counts as {UNATTRIBUTED!r}, "
                     "so the entry sources behind an imbalance cannot be told apart.")
    notes += _missing_days(frame, table)
    first_day = table.dates[0].item()
    schedule = AllocationSchedule.from_steps(options.arms, options.schedule_steps(first_day))
    notes += _schedule_notes(options, table)
    return Loaded(table, schedule, len(frame), notes)


def _trimmed(frame: pd.DataFrame, options: AnalysisOptions, notes: list[str]
             ) -> tuple[pd.DataFrame, np.ndarray]:
    """Rows dated within ``--start``..``--end`` and their positions in the file (a date that
    cannot be read is kept, for validation to name)."""
    keep = np.ones(len(frame), dtype=bool)
    if options.start or options.end:
        text = frame["date"].astype("string").str.strip()
        days = pd.to_datetime(text, format="%Y-%m-%d", errors="coerce")
        left_out: list[str] = []
        for option, day, before in (("--start", options.start, True),
                                    ("--end", options.end, False)):
            if day is None:
                continue
            outside = ((days < pd.Timestamp(day)) if before
                       else (days > pd.Timestamp(day))).to_numpy(dtype=bool)
            keep &= ~outside
            if outside.any():
                side = "before" if before else "after"
                left_out.append(f"{int(outside.sum()):,} dated {side} {day.isoformat()} "
                                f"({option})")
        if left_out:
            notes.append(f"left out {' and '.join(left_out)} of {len(frame):,} rows.")
        if not keep.any():
            valid = days.dropna()
            span = (f"the file's dates run from {valid.min():%Y-%m-%d} to "
                    f"{valid.max():%Y-%m-%d}" if len(valid) else "no date in the file reads")
            raise BadInputError([_item("--start" if options.start else "--end",
                                  f"no row is left to analyse: {span}")])
    positions = np.flatnonzero(keep)
    return frame.iloc[positions].reset_index(drop=True), positions


def _absent_arms(frame: pd.DataFrame, arms: tuple[str, ...]) -> list[dict[str, Any]]:
    """``--arms`` names that no row of the file has (a typo there refuses every row of the
    arm it meant), with the file's arm closest to each."""
    found = sorted({str(a).strip() for a in frame["arm"].dropna().unique()})
    items = []
    for arm in arms:
        if arm in found:
            continue
        others = [a for a in found if a not in arms]
        close = close_names(arm, others)
        hint = f"; did you mean {close!r}?" if close else ""
        items.append(_item("--arms", f"no row has the arm {arm!r} (the file's arms are "
                           f"{', '.join(found[:10])}){hint}"))
    return items


def _missing_days(frame: pd.DataFrame, table: ObservationTable) -> list[str]:
    present = np.unique(pd.to_datetime(frame["date"].astype("string").str.strip(),
                                       format="%Y-%m-%d").to_numpy().astype("datetime64[D]"))
    missing = table.dates[~np.isin(table.dates, present)]
    if not missing.size:
        return []
    shown = ", ".join(str(d) for d in missing[:6]) + (", …" if missing.size > 6 else "")
    return [f"no rows for {missing.size:,} day{'s' if missing.size > 1 else ''} ({shown}): "
            "they count as days on which no unit entered; if the export skipped them, "
            "the daily tests see a gap, not a quiet day."]


def _schedule_notes(options: AnalysisOptions, table: ObservationTable) -> list[str]:
    dated = [s.start for s in options.steps if s.start is not None]
    if not dated:
        return []
    first, last = table.dates[0].item(), table.dates[-1].item()
    notes = []
    if min(dated) > first:
        notes.append(f"the first --allocation step starts on {min(dated).isoformat()}, after "
                     f"the first day {first.isoformat()}: the days before it are compared "
                     "with that step's weights.")
    late = [d.isoformat() for d in dated if d > last]
    if late:
        notes.append(f"--allocation step(s) from {', '.join(late)} start after the last day "
                     f"{last.isoformat()} and are not used.")
    return notes


def _missing_file(path: Path) -> str:
    message = f"no such file: {str(path)!r}"
    folder = path.parent if path.parent.is_dir() else None
    if folder is not None:
        names = [p.name for p in folder.iterdir() if p.is_file()]
        close = difflib.get_close_matches(path.name, names, n=1, cutoff=0.6)
        if close:
            message += f"; did you mean {str(folder / close[0])!r}?"
    return message


def _exclude_date(text: str) -> dt.date | str:
    try:
        return dt.date.fromisoformat(text.strip())
    except ValueError:
        return text.strip()


def _item(field_name: str, message: str) -> dict[str, Any]:
    return {"row": None, "field": field_name, "message": message}


def _option_items(error: InputError) -> list[dict[str, Any]]:
    """Problems the detectors raised about settings, named by the option that sets them."""
    return [_item(_OPTION_FIELDS.get(p.field.split("[")[0].split(".")[0], p.field), p.message)
            for p in error.problems]


def _bad_input(args: argparse.Namespace, items: list[dict[str, Any]]) -> int:
    if args.json:
        json.dump(problem_document(items, instance=Path(args.file).resolve().as_uri()),
                  sys.stdout, indent=2)
        sys.stdout.write("\n")
        return EXIT_BAD_INPUT
    width = wrap_width()
    print(textwrap.fill(f"inrush: {args.file} cannot be analysed ({summary(items)}); fix "
                        "these and run again:", width, subsequent_indent="    "),
          file=sys.stderr)
    for line in grouped_lines(items):
        print(textwrap.fill(line, width, initial_indent="  - ", subsequent_indent="    "),
              file=sys.stderr)
    return EXIT_BAD_INPUT


def _emit(args: argparse.Namespace, loaded: Loaded, document: dict[str, Any],
          formatter: Callable[[dict[str, Any]], str]) -> None:
    width = wrap_width()
    for note in loaded.notes:
        print(textwrap.fill(f"inrush: note: {note}", width, subsequent_indent="    "),
              file=sys.stderr)
    if args.json:
        json.dump({**document, "input_notes": loaded.notes}, sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(formatter(document))


