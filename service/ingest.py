"""Observation uploads: parse a JSON or CSV body, validate every row, upsert in one transaction.

Validation is the detectors' own (``detectors.data.validate_frame``, which the offline CLI uses
too), after a shape check of JSON rows; every problem is collected, with its 0-based row, so one
answer lists everything to fix. Nothing is written unless every row is valid.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass

import msgspec
import numpy as np
import pandas as pd
from msgspec import UNSET
from pydantic import TypeAdapter, ValidationError
from sqlalchemy.orm import Session

from detectors.data import (
    MAX_METRICS,
    MAX_UNITS,
    STAT_FIELDS,
    ObservationTable,
    records_to_frame,
    validate_frame,
)
from detectors.errors import InputError, Problem

from .csvio import read_csv_rows
from .db.models import Experiment, utcnow
from .db.observation_store import ObservationColumns, StagedUpload, upsert_observations
from .gc_pause import paused_garbage_collection
from .json_guard import JSONBodyError, find_bad_string, format_path, strict_loads
from .schemas.observations import ObservationIn, PlainBatch, rows_plainly_conform

_ROWS_ADAPTER: TypeAdapter[list[ObservationIn]] = TypeAdapter(list[ObservationIn])


class MalformedBodyError(ValueError):
    """The body cannot be parsed at all (not JSON, not an object with ``rows``...)."""


class TooManyRowsError(ValueError):
    def __init__(self, count: int, limit: int) -> None:
        super().__init__(f"the request has {count} rows; at most {limit} are accepted per "
                         "request")
        self.count = count
        self.limit = limit


@dataclass(frozen=True)
class ParsedBody:
    """Rows in the flat layout, indexed by their position in the request, and the problems of
    rows that could not even be read (they are not in ``frame``)."""

    frame: pd.DataFrame
    problems: list[Problem]
    lines: np.ndarray | None = None  # CSV: the file line of each row (header = line 1)


def parse_json_body(body: bytes, max_rows: int) -> ParsedBody:
    """The rows of ``{"rows": [...]}`` as a flat frame; shape problems raise InputError."""
    # The parse allocates a few objects per cell and nothing of it is cyclic: collecting
    # meanwhile only re-scans the whole heap again and again (half of the time otherwise).
    with paused_garbage_collection():
        return _parse_json_body(body, max_rows)


def _parse_json_body(body: bytes, max_rows: int) -> ParsedBody:
    # Strict: UTF-8, no NaN/Infinity, no repeated member names, no NUL or lone surrogates.
    plain = _plain_rows(body, max_rows)
    if plain is not None:
        return ParsedBody(plain, [])
    try:
        document = strict_loads(body, check_strings=False)
    except JSONBodyError as error:
        raise MalformedBodyError(error.message) from None
    # Valid UTF-8 JSON can only carry U+0000 or a lone surrogate as a \u escape.
    found = find_bad_string(document) if b"\\u" in body else None
    if found is not None:
        path, reason = found
        row = path[1] if len(path) >= 2 and path[0] == "rows" and isinstance(path[1], int) \
            else None
        field = format_path(path[2:] if row is not None else path)
        raise InputError([Problem(field, reason, row)])
    if not isinstance(document, dict) or "rows" not in document:
        raise InputError([Problem("rows", 'the body must be an object {"rows": [...]}')])
    unknown = sorted(set(document) - {"rows"})
    if unknown:
        raise InputError([Problem(name, "unknown field") for name in unknown])
    rows = document["rows"]
    if not isinstance(rows, list):
        raise InputError([Problem("rows", "must be a list of row objects")])
    if len(rows) > max_rows:
        raise TooManyRowsError(len(rows), max_rows)
    if not rows:
        raise InputError([Problem("rows", "no observations: at least one row is needed")])

    if rows_plainly_conform(rows):  # the common case, without a model per row
        return ParsedBody(records_to_frame(rows), [])
    problems: list[Problem] = []
    failed: set[int] = set()
    try:
        _ROWS_ADAPTER.validate_python(rows)
    except ValidationError as error:
        for item in error.errors(include_url=False):
            index, *location = item["loc"]
            assert isinstance(index, int)
            failed.add(index)
            problems.append(Problem(".".join(str(p) for p in location) or "row", item["msg"],
                                    index))
    if not failed:
        return ParsedBody(records_to_frame(rows), problems)
    good = [i for i in range(len(rows)) if i not in failed]
    frame = records_to_frame([rows[i] for i in good])
    frame.index = pd.Index(good)
    return ParsedBody(frame, problems)


_PLAIN_BATCH = msgspec.json.Decoder(PlainBatch)


def _plain_rows(body: bytes, max_rows: int) -> pd.DataFrame | None:
    """The common upload, read and shape-checked in one pass by msgspec: ``{"rows": [...]}``
    with rows of the plain shape (:class:`PlainRow`), no string escapes, and provably no
    repeated member name; as the flat frame :func:`records_to_frame` would build. ``None``
    otherwise: the caller then parses strictly, and names whatever is wrong.

    msgspec refuses what RFC 8259 refuses (NaN, invalid UTF-8...), but a repeated member
    silently keeps its last value. Each member of the text has one ``:`` outside strings, and
    any ``:`` inside one only adds to the count, so when the body holds exactly as many ``:``
    as the decoded document has members, no member was repeated.
    """
    if b"\\" in body:  # escapes may hide U+0000 or a lone surrogate: the strict path checks
        return None
    try:
        rows = _PLAIN_BATCH.decode(body).rows
    except (msgspec.DecodeError, msgspec.ValidationError):
        return None
    if not rows or len(rows) > max_rows:
        return None
    metrics = [row.metrics or {} for row in rows]  # UNSET and None are both falsy
    # A member per field sent, and per metric its name and three statistics.
    members = 1 + 3 * len(rows) + sum(row.source is not UNSET for row in rows) \
        + sum(row.metrics is not UNSET for row in rows) + 4 * sum(map(len, metrics))
    if body.count(b":") != members:
        return None
    columns: dict[str, list[object]] = {
        "date": [row.date for row in rows], "arm": [row.arm for row in rows],
        "source": [None if row.source is UNSET else row.source for row in rows],
        "entered": [row.entered for row in rows]}
    names = list(dict.fromkeys(name for cells in metrics for name in cells))
    if len(names) > MAX_METRICS:
        return None  # the strict path names the limit
    for name in names:
        stats = [cells.get(name) for cells in metrics]
        columns[f"{name}.n"] = [None if s is None else s.n for s in stats]
        columns[f"{name}.sum"] = [None if s is None else s.sum for s in stats]
        columns[f"{name}.sum_sq"] = [None if s is None else s.sum_sq for s in stats]
    return pd.DataFrame(columns)


def parse_csv_body(body: bytes, max_rows: int) -> ParsedBody:
    """The CSV rows as a frame (text, or numbers parsed for a plain file) with each row's file
    line; the header may only name known columns."""
    rows = read_csv_rows(body)
    if len(rows.frame) > max_rows:
        raise TooManyRowsError(len(rows.frame), max_rows)
    if rows.unused:
        raise InputError(list(rows.unused))
    return ParsedBody(rows.frame, [], rows.lines)


def validate_rows(parsed: ParsedBody, experiment: Experiment, *, today: dt.date,
                  future_days: int) -> ObservationColumns:
    """Check every row against the experiment and return the rows to store; raise InputError
    listing all problems."""
    frame, shape_problems = parsed.frame, parsed.problems
    positions = frame.index.to_numpy()
    last_accepted = today + dt.timedelta(days=future_days)
    semantic: list[Problem] = []
    clean: pd.DataFrame | None = None
    names: list[str] = []
    if len(frame):
        try:
            clean, names = validate_frame(frame.reset_index(drop=True), experiment.arms,
                                          start=experiment.start_date, end=last_accepted)
        except InputError as error:
            semantic = [Problem(p.field, p.message,
                                None if p.row is None else int(positions[p.row]))
                        for p in error.problems]
    elif not shape_problems:
        semantic = [Problem("rows", "no observations: at least one row is needed")]
    problems = _merge(shape_problems, semantic)
    if problems:
        raise InputError(problems)
    assert clean is not None
    return _columns(frame.reset_index(drop=True), clean, names)


def upsert_rows(session: Session, experiment: Experiment, rows: ObservationColumns
                ) -> StagedUpload:
    """Insert or replace the rows (key: experiment, date, arm, source) in one statement.

    The inserted and updated counts of the result are exact because the caller holds the
    experiment's write lock (``service.db.locks``).
    """
    return upsert_observations(session, experiment.id, rows, utcnow())


def check_experiment_limits(rows: ObservationColumns) -> None:
    """Raise InputError when an experiment's rows (stored and uploaded together) exceed what
    it may hold: :data:`MAX_METRICS` metrics and :data:`MAX_UNITS` units in all."""
    _check_limits(len(rows.metrics), float(np.sum(rows.entered, dtype=np.float64)))


def check_table_limits(table: ObservationTable) -> None:
    """:func:`check_experiment_limits` on the experiment's table (kept in memory)."""
    _check_limits(len(table.metrics), float(np.sum(table.entered, dtype=np.float64)))


def _check_limits(metrics: int, total: float) -> None:
    # Totals in float64: int64 could wrap.
    problems: list[Problem] = []
    if metrics > MAX_METRICS:
        problems.append(Problem("metrics", f"the experiment would carry {metrics} "
                                f"metrics; at most {MAX_METRICS} are accepted per experiment"))
    if total > MAX_UNITS:
        problems.append(Problem("entered", f"the experiment would hold {total:,.0f} units; at "
                                f"most {MAX_UNITS:,} (10^12) are accepted in all"))
    if problems:
        raise InputError(problems)


def _columns(raw: pd.DataFrame, clean: pd.DataFrame, names: Sequence[str]
             ) -> ObservationColumns:
    """The rows to store; a metric whose three cells were all empty stays absent."""
    metrics = {name: clean[[f"{name}.{s}" for s in STAT_FIELDS]].to_numpy(float)
               for name in names}
    present = {name: ~raw[[f"{name}.{s}" for s in STAT_FIELDS]].isna().all(axis=1).to_numpy()
               for name in names}
    return ObservationColumns(clean["date"].to_numpy().astype("datetime64[D]"),
                              clean["arm"].to_numpy(str), clean["source"].to_numpy(str),
                              clean["entered"].to_numpy(np.int64), metrics, present)


def _merge(first: list[Problem], second: list[Problem]) -> list[Problem]:
    """Both lists, one problem per (row, field), sorted by row."""
    seen: set[tuple[int | None, str]] = set()
    merged: list[Problem] = []
    for problem in [*first, *second]:
        key = (problem.row, problem.field)
        if key in seen:
            continue
        seen.add(key)
        merged.append(problem)
    merged.sort(key=lambda p: (-1 if p.row is None else p.row, p.field))
    return merged
