"""Observation uploads: parse a JSON or CSV body, validate every row, upsert in one transaction.

Validation is the detectors' own (``detectors.data.validate_frame``, which the offline CLI uses
too), after a shape check of JSON rows; every problem is collected, with its 0-based row, so one
answer lists everything to fix. Nothing is written unless every row is valid.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from pydantic import TypeAdapter, ValidationError
from sqlalchemy import select
from sqlalchemy.dialects.postgresql import insert as postgresql_insert
from sqlalchemy.dialects.sqlite import insert as sqlite_insert
from sqlalchemy.orm import Session

from detectors.data import STAT_FIELDS, metric_columns, records_to_frame, validate_frame
from detectors.errors import InputError, Problem

from .csvio import read_observations_csv
from .db.models import Experiment, Observation, utcnow
from .json_guard import JSONBodyError, find_bad_string, format_path, strict_loads
from .schemas.observations import ObservationIn

BASE_COLUMNS = ("date", "arm", "source", "entered")
_ROWS_ADAPTER: TypeAdapter[list[ObservationIn]] = TypeAdapter(list[ObservationIn])
_UPSERT_CHUNK = 1000


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


@dataclass(frozen=True)
class ValidRows:
    """Rows ready to store: one dict per row with the Observation columns."""

    records: list[dict[str, Any]]
    dates: tuple[dt.date, dt.date]


def parse_json_body(body: bytes, max_rows: int) -> ParsedBody:
    """The rows of ``{"rows": [...]}`` as a flat frame; shape problems raise InputError."""
    # Strict: UTF-8, no NaN/Infinity, no repeated member names, no NUL or lone surrogates.
    try:
        document = strict_loads(body, check_strings=False)
    except JSONBodyError as error:
        raise MalformedBodyError(error.message) from None
    found = find_bad_string(document)
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
    good = [i for i in range(len(rows)) if i not in failed]
    frame = records_to_frame([rows[i] for i in good])
    frame.index = pd.Index(good)
    return ParsedBody(frame, problems)


def parse_csv_body(body: bytes, max_rows: int) -> ParsedBody:
    """The CSV rows as a frame of strings; the header may only name known columns."""
    frame = read_observations_csv(body)
    if len(frame) > max_rows:
        raise TooManyRowsError(len(frame), max_rows)
    known = set(BASE_COLUMNS)
    names = metric_columns(frame.columns)
    known.update(f"{name}.{stat}" for name in names for stat in STAT_FIELDS)
    unknown = [c for c in frame.columns if c not in known]
    if unknown:
        raise InputError([Problem("header", f"unknown column {c!r}: columns are date, arm, "
                                  "source, entered and NAME.n, NAME.sum, NAME.sum_sq per "
                                  "metric") for c in unknown])
    return ParsedBody(frame, [])


def validate_rows(parsed: ParsedBody, experiment: Experiment, *, today: dt.date,
                  future_days: int) -> ValidRows:
    """Check every row against the experiment; raise InputError listing all problems."""
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
    return ValidRows(_records(frame.reset_index(drop=True), clean, names),
                     (clean["date"].min().date(), clean["date"].max().date()))


def upsert_rows(session: Session, experiment: Experiment, rows: ValidRows) -> tuple[int, int]:
    """Insert or replace the rows (key: experiment, date, arm, source); (inserted, updated).

    The upsert itself is atomic (``INSERT ... ON CONFLICT DO UPDATE``); the two counts are exact
    because the caller holds the experiment's write lock (``service.db.locks``).
    """
    first, last = rows.dates
    existing = {tuple(row) for row in session.execute(
        select(Observation.date, Observation.arm, Observation.source).where(
            Observation.experiment_id == experiment.id, Observation.date >= first,
            Observation.date <= last))}
    updated = sum((r["date"], r["arm"], r["source"]) in existing for r in rows.records)
    dialect = session.get_bind().dialect.name
    insert = postgresql_insert if dialect == "postgresql" else sqlite_insert
    if dialect not in ("postgresql", "sqlite"):
        raise RuntimeError(f"upserts are implemented for SQLite and PostgreSQL, not {dialect}")
    statement = insert(Observation)
    statement = statement.on_conflict_do_update(
        index_elements=["experiment_id", "date", "arm", "source"],
        set_={"entered": statement.excluded.entered, "metrics": statement.excluded.metrics,
              "updated_at": statement.excluded.updated_at})
    now = utcnow()
    for start in range(0, len(rows.records), _UPSERT_CHUNK):
        chunk = [{**r, "experiment_id": experiment.id, "updated_at": now}
                 for r in rows.records[start:start + _UPSERT_CHUNK]]
        session.execute(statement, chunk)
    return len(rows.records) - updated, updated


def _records(raw: pd.DataFrame, clean: pd.DataFrame, names: Sequence[str]
             ) -> list[dict[str, Any]]:
    """Observation column dicts; a metric whose three cells were all empty stays absent."""
    dates = [d.date() for d in pd.to_datetime(clean["date"])]
    arms = clean["arm"].tolist()
    sources = clean["source"].tolist()
    entered = clean["entered"].astype(np.int64).tolist()
    per_metric: list[tuple[str, np.ndarray, list[int], list[float], list[float]]] = []
    for name in names:
        present = ~raw[[f"{name}.{s}" for s in STAT_FIELDS]].isna().all(axis=1).to_numpy()
        per_metric.append((name, present, clean[f"{name}.n"].astype(np.int64).tolist(),
                           clean[f"{name}.sum"].astype(float).tolist(),
                           clean[f"{name}.sum_sq"].astype(float).tolist()))
    records = []
    for i in range(len(clean)):
        metrics = {name: {"n": n[i], "sum": total[i], "sum_sq": squares[i]}
                   for name, present, n, total, squares in per_metric if present[i]}
        records.append({"date": dates[i], "arm": arms[i], "source": sources[i],
                        "entered": entered[i], "metrics": metrics})
    return records


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
