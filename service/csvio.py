"""Reading observation CSV files into the flat frame the detectors validate."""

from __future__ import annotations

import csv
import io
from pathlib import Path

import pandas as pd

from detectors.errors import InputError, Problem

REQUIRED_COLUMNS = ("date", "arm", "entered")


def read_observations_csv(source: str | bytes | Path) -> pd.DataFrame:
    """Parse CSV text, bytes or a file into a frame of strings (validation happens later).

    A UTF-8 byte-order mark is accepted; any other encoding, ragged rows, an empty file or a
    missing required column raise :class:`InputError` naming the problem and the row.
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
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    try:
        header = [name.strip() for name in next(reader)]
        rows = list(reader)
    except csv.Error as error:
        raise InputError([Problem("body", f"CSV is malformed: {error}")]) from None
    problems: list[Problem] = []
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        problems.append(Problem("header", f"missing required column(s): {', '.join(missing)}"))
    duplicated = sorted({c for c in header if header.count(c) > 1})
    if duplicated:
        problems.append(Problem("header", f"repeated column(s): {', '.join(duplicated)}"))
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


def write_observations_csv(rows: list[dict[str, object]]) -> str:
    """Rows ``{date, arm, source, entered, metrics: {name: {n, sum, sum_sq}}}`` as CSV text.

    The layout is the one :func:`read_observations_csv` reads: ``date,arm,source,entered`` then
    ``NAME.n,NAME.sum,NAME.sum_sq`` per metric (sorted by name); a metric absent on a row
    leaves its three cells empty.
    """
    names = sorted({name for row in rows for name in (row.get("metrics") or {})})  # type: ignore[union-attr]
    header = ["date", "arm", "source", "entered"]
    header += [f"{name}.{stat}" for name in names for stat in ("n", "sum", "sum_sq")]
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\n")
    # QUOTE_MINIMAL quotes "\n" (the line terminator) but not a lone "\r", which readers take
    # for a line end: rows holding one are written fully quoted.
    quoting_writer = csv.writer(buffer, lineterminator="\n", quoting=csv.QUOTE_ALL)
    writer.writerow(header)
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
