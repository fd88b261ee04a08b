"""Reading observation CSV files into the flat frame the detectors validate."""

from __future__ import annotations

import csv
import io
from collections.abc import Iterable
from pathlib import Path

import numpy as np
import pandas as pd

from detectors.errors import InputError, Problem

REQUIRED_COLUMNS = ("date", "arm", "entered")


def read_observations_csv(source: str | bytes | Path) -> pd.DataFrame:
    """Parse CSV text, bytes or a file into a frame (validation happens later).

    A UTF-8 byte-order mark is accepted; any other encoding, ragged rows, an empty file or a
    missing required column raise :class:`InputError` naming the problem and the row. A plain
    file is read by :func:`plain_csv` (numbers parsed), anything else by :func:`strict_csv`
    (all text); :func:`detectors.data.validate_frame` takes either.
    """
    if isinstance(source, Path):
        source = source.read_bytes()
    if isinstance(source, bytes):
        try:
            source = source.decode("utf-8-sig")
        except UnicodeDecodeError as error:
            raise InputError([Problem("body", f"CSV must be UTF-8 (byte {error.start} is not)")]
                             ) from None
    text = source.lstrip("\ufeff")
    if not text.strip():
        raise InputError([Problem("body", "the CSV is empty: a header row and data are needed")])
    if "\x00" in text:  # no database text column can hold U+0000
        line = text.count("\n", 0, text.index("\x00")) + 1
        raise InputError([Problem("body", f"line {line} contains a NUL character (U+0000); "
                                  "is the file UTF-16 or binary?")])
    plain = plain_csv(text)
    return plain if plain is not None else strict_csv(text)


def strict_csv(text: str) -> pd.DataFrame:
    """Any CSV text (decoded, no NUL) by the standard library's strict reader: a frame of
    strings; every problem is raised with its row."""
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        header = [name.strip() for name in next(reader)]
        rows = list(reader)
    except csv.Error as error:
        raise InputError([Problem("body", f"CSV is malformed: {error}")]) from None
    problems = _header_problems(header)
    if problems:
        raise InputError(problems)
    rows = [r for r in rows if r != []]  # blank lines carry nothing
    for index, row in enumerate(rows):
        if len(row) != len(header):
            problems.append(Problem("row", f"has {len(row)} fields, the header has "
                                    f"{len(header)}", index))
    if problems:
        raise InputError(problems)
    if not rows:
        raise InputError([Problem("rows", "the CSV has a header but no data rows")])
    frame = pd.DataFrame(rows, columns=header, dtype="string")
    return frame.replace({"": pd.NA})


def _header_problems(header: list[str]) -> list[Problem]:
    """What is wrong with the (stripped) header names: required columns missing, repeats."""
    problems: list[Problem] = []
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        problems.append(Problem("header", f"missing required column(s): {', '.join(missing)}"))
    duplicated = sorted({c for c in header if header.count(c) > 1})
    if duplicated:
        problems.append(Problem("header", f"repeated column(s): {', '.join(duplicated)}"))
    return problems


_TEXT_COLUMNS = ("date", "arm", "source")


def plain_csv(text: str) -> pd.DataFrame | None:
    """The common file, read by pandas' C parser: no quotes, a unique header with the required
    columns, every line with as many fields as the header, every other column numbers.
    ``None`` otherwise; the caller then reads it with :func:`strict_csv`, which names each
    problem. Text columns stay text; numbers arrive parsed (the JSON path's shape), and an
    empty cell is missing."""
    if '"' in text:
        return None
    first, _, _ = text.partition("\n")
    header = [name.strip() for name in first.rstrip("\r").split(",")]
    if _header_problems(header):
        return None
    # Fields per line, counted over the bytes at once: every line must have the header's.
    raw = np.frombuffer(text.encode("utf-8"), dtype=np.uint8)
    line_ends = np.flatnonzero(raw == ord("\n"))
    commas = np.bincount(np.searchsorted(line_ends, np.flatnonzero(raw == ord(","))),
                         minlength=len(line_ends) + 1)
    if text.endswith("\n"):
        commas = commas[:-1]  # after the last line end there is no line
    if len(commas) < 2 or np.any(commas != len(header) - 1):
        return None
    try:
        frame = pd.read_csv(io.StringIO(text), engine="c", header=0, names=header,
                            dtype={c: str for c in _TEXT_COLUMNS if c in header},
                            keep_default_na=False, na_values=[""], skip_blank_lines=False)
    except (ValueError, pd.errors.ParserError):
        return None
    numbers = [c for c in header if c not in _TEXT_COLUMNS]
    if len(frame) != len(commas) - 1 or any(
            frame[c].dtype not in (np.int64, np.float64) for c in numbers):
        return None  # a cell that is not a number: the strict reader names it
    for column in _TEXT_COLUMNS:
        if column in frame:
            frame[column] = frame[column].astype("string")
    return frame


def write_observations_csv(rows: list[dict[str, object]]) -> str:
    """Rows ``{date, arm, source, entered, metrics: {name: {n, sum, sum_sq}}}`` as CSV text.

    The layout is the one :func:`read_observations_csv` reads: ``date,arm,source,entered`` then
    ``NAME.n,NAME.sum,NAME.sum_sq`` per metric (sorted by name); a metric absent on a row
    leaves its three cells empty.
    """
    names = sorted({name for row in rows for name in (row.get("metrics") or {})})  # type: ignore[union-attr]
    return observations_csv_header(names) + observations_csv_lines(rows, names)


def observations_csv_header(names: list[str]) -> str:
    """The header line of an export whose metrics are ``names`` (in that order)."""
    header = ["date", "arm", "source", "entered"]
    header += [f"{name}.{stat}" for name in names for stat in ("n", "sum", "sum_sq")]
    buffer = io.StringIO(newline="")
    csv.writer(buffer, lineterminator="\n").writerow(header)
    return buffer.getvalue()


def observations_csv_lines(rows: Iterable[dict[str, object]], names: list[str]) -> str:
    """The lines of ``rows`` (no header), columns as :func:`observations_csv_header` names:
    a streamed export writes its rows a part at a time."""
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    # QUOTE_MINIMAL quotes "\n" (the line terminator) but not a lone "\r", which readers take
    # for a line end: rows holding one are written fully quoted.
    quoting_writer = csv.writer(buffer, lineterminator="\n", quoting=csv.QUOTE_ALL)
    for row in rows:
        metrics: dict[str, dict[str, object]] = row.get("metrics") or {}  # type: ignore[assignment]
        cells = [row["date"], row["arm"], row["source"], row["entered"]]
        for name in names:
            stats = metrics.get(name)
            cells += ([repr_number(stats[s]) for s in ("n", "sum", "sum_sq")] if stats
                      else ["", "", ""])
        carriage_return = any(isinstance(c, str) and "\r" in c for c in cells)
        (quoting_writer if carriage_return else writer).writerow(cells)
    return buffer.getvalue()


def repr_number(value: object) -> str:
    """Shortest text that reads back as the same number (``repr`` of floats round-trips)."""
    if isinstance(value, float) and value.is_integer() and abs(value) < 2**53:
        return str(int(value))
    return repr(value) if isinstance(value, float) else str(value)
