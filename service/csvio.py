"""Reading observation CSV files into the flat frame the detectors validate."""

from __future__ import annotations

import csv
import difflib
import io
import itertools
import re
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from detectors.data import MAX_METRICS
from detectors.errors import InputError, Problem

REQUIRED_COLUMNS = ("date", "arm", "entered")
BASE_COLUMNS = ("date", "arm", "source", "entered")
STATISTICS = ("n", "sum", "sum_sq")
# Field separators a spreadsheet export may use, in the order they are tried.
DELIMITERS = (",", ";", "\t", "|")
_DELIMITER_NAMES = {",": "comma", ";": "semicolon", "\t": "tab", "|": "vertical bar"}


@dataclass(frozen=True)
class CsvRows:
    """A parsed CSV file: the frame (validation happens later), the file line on which each
    data row starts (header = line 1; blank lines are skipped, not counted as rows) and the
    field separator that was found. Columns the file has but the contract does not use are
    in ``unused`` (:func:`column_problems` says what each looks like)."""

    frame: pd.DataFrame
    lines: np.ndarray
    delimiter: str
    unused: tuple[Problem, ...] = ()

    @property
    def delimiter_name(self) -> str:
        return _DELIMITER_NAMES[self.delimiter]


class CsvInputError(InputError):
    """An :class:`InputError` of the reader itself; ``lines`` maps its rows to file lines."""

    def __init__(self, problems: list[Problem], lines: np.ndarray | None = None) -> None:
        super().__init__(problems)
        self.lines = lines
# date, arm, source, entered and three columns per metric.
MAX_COLUMNS = 4 + 3 * MAX_METRICS


def read_observations_csv(source: str | bytes | Path) -> pd.DataFrame:
    """Parse CSV text, bytes or a file into a frame (validation happens later); see
    :func:`read_csv_rows`, which also gives each row's file line."""
    return read_csv_rows(source).frame


def read_csv_rows(source: str | bytes | Path) -> CsvRows:
    """Parse CSV text, bytes or a file (comma, semicolon, tab or vertical-bar separated).

    A UTF-8 byte-order mark is accepted; another encoding (named when it looks like Latin-1
    or UTF-16), ragged rows, an empty file or a missing required column raise
    :class:`CsvInputError` naming the problem, the row and the line. A plain comma-separated
    file is read by :func:`plain_csv` (numbers parsed), anything else by :func:`strict_csv`
    (all text); :func:`detectors.data.validate_frame` takes either.
    """
    text = decode_csv(source.read_bytes() if isinstance(source, Path) else source)
    if not text.strip():
        raise CsvInputError([Problem("body", "the CSV is empty: a header row and data are "
                                     "needed")])
    if "\x00" in text:  # no database text column can hold U+0000
        line = text.count("\n", 0, text.index("\x00")) + 1
        raise CsvInputError([Problem("body", f"line {line} contains a NUL character (U+0000); "
                                     "is the file UTF-16 or binary?")])
    delimiter = sniff_delimiter(text)
    plain = plain_csv(text) if delimiter == "," else None
    if plain is not None:
        rows = CsvRows(plain, np.arange(2, len(plain) + 2), delimiter)
    else:
        frame, lines = strict_csv_lines(text, delimiter)
        rows = CsvRows(frame, lines, delimiter)
    errors, unused = column_problems(list(rows.frame.columns))
    if errors:
        raise CsvInputError(errors)
    return CsvRows(restore_text_cells(rows.frame), rows.lines, rows.delimiter,
                   tuple(unused))


# Leading characters that make spreadsheet programs read a cell as a formula (OWASP, "CSV
# Injection"); an apostrophe is added too so that the escape can be undone exactly.
_FORMULA_TRIGGERS = ("=", "+", "-", "@", "\t", "\r", "'")
_ESCAPED = r"^'[=+\-@\t\r']"
_ESCAPED_COLUMNS = ("arm", "source")


def neutralise_cell(value: str) -> str:
    """A text cell as exports write it: prefixed with an apostrophe when it starts with a
    character that spreadsheets would take for a formula (``=``, ``+``, ``-``, ``@``, tab, CR)
    or with an apostrophe itself; :func:`restore_text_cells` undoes it. Numbers are never
    passed here (``-1`` stays a number).

    Example:
        >>> neutralise_cell("=HYPERLINK(1)"), neutralise_cell("organic")
        ("'=HYPERLINK(1)", 'organic')
    """
    return "'" + value if value.startswith(_FORMULA_TRIGGERS) else value


def restore_text_cells(frame: pd.DataFrame) -> pd.DataFrame:
    """The arm and source cells with the export's escape (:func:`neutralise_cell`) removed:
    an apostrophe followed by ``=``, ``+``, ``-``, ``@``, tab, CR or another apostrophe."""
    for column in _ESCAPED_COLUMNS:
        if column in frame:
            cells = frame[column]
            escaped = cells.str.contains(_ESCAPED, regex=True, na=False)
            if escaped.any():
                frame[column] = cells.mask(escaped, cells.str.slice(1))
    return frame


def decode_csv(source: str | bytes) -> str:
    """UTF-8 text without a byte-order mark; other encodings are refused with the line of the
    first byte that is not UTF-8 and, when it looks like one, the encoding's name."""
    if isinstance(source, str):
        return source.lstrip("\ufeff")
    if source.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise CsvInputError([Problem("body", "the file is UTF-16 (it starts with a UTF-16 "
                                     "byte-order mark): save it as UTF-8 CSV")])
    try:
        return source.decode("utf-8-sig").lstrip("\ufeff")
    except UnicodeDecodeError as error:
        raise CsvInputError([Problem("body", _encoding_message(source, error.start))]
                            ) from None


def _encoding_message(data: bytes, position: int) -> str:
    line_start = data.rfind(b"\n", 0, position) + 1
    line_end = data.find(b"\n", position)
    line = data[line_start:None if line_end < 0 else line_end].rstrip(b"\r")
    number = data.count(b"\n", 0, position) + 1
    byte = data[position]
    # Latin-1 decodes any byte: the question is whether the line reads like text in it (a
    # letter such as e-acute, not a control character).
    shown = line.decode("latin-1")
    if 0xA0 <= byte <= 0xFF or byte in (0x80, 0x8A, 0x8C, 0x8E, 0x9A, 0x9C, 0x9E, 0x9F):
        return (f"line {number} is not UTF-8 (byte 0x{byte:02X} in {shown[:80]!r}): the file "
                "looks like Latin-1 (ISO-8859-1) or Windows-1252 text; save it as UTF-8 (for "
                "example `iconv -f latin1 -t utf-8 in.csv > out.csv`)")
    return (f"line {number} is not UTF-8 (byte 0x{byte:02X} at offset {position}): save the "
            "file as UTF-8 CSV")


def sniff_delimiter(text: str) -> str:
    """The field separator of the header line: the first of :data:`DELIMITERS` that splits it
    into the required columns, else the one it holds most of (a comma when it holds none)."""
    header = text.partition("\n")[0].rstrip("\r")
    for delimiter in DELIMITERS:
        names = {name.strip().strip('"') for name in header.split(delimiter)}
        if all(column in names for column in REQUIRED_COLUMNS):
            return delimiter
    counts = {delimiter: header.count(delimiter) for delimiter in DELIMITERS}
    best = max(DELIMITERS, key=lambda d: counts[d])
    return best if counts[best] else ","


def strict_csv(text: str, delimiter: str = ",") -> pd.DataFrame:
    """Any CSV text (decoded, no NUL) by the standard library's strict reader: a frame of
    strings; every problem is raised with its row."""
    return strict_csv_lines(text, delimiter)[0]


def strict_csv_lines(text: str, delimiter: str = ",") -> tuple[pd.DataFrame, np.ndarray]:
    """:func:`strict_csv` and the file line on which each of its rows starts."""
    reader = csv.reader(io.StringIO(text, newline=""), strict=True, delimiter=delimiter)
    rows: list[list[str]] = []
    lines: list[int] = []
    try:
        header = [name.strip() for name in next(reader)]
        problems = _header_problems(header, text, delimiter)
        if problems:  # before reading the rows: a bad header makes them meaningless
            raise CsvInputError(problems)
        line = reader.line_num + 1
        for row in reader:
            if row != []:  # blank lines carry nothing
                rows.append(row)
                lines.append(line)
            line = reader.line_num + 1
    except csv.Error as error:
        raise CsvInputError([Problem("body", f"CSV is malformed: {error} (line "
                                     f"{reader.line_num})")]) from None
    for index, row in enumerate(rows):
        if len(row) != len(header):
            problems.append(Problem("row", _ragged_message(row, header, delimiter), index))
    if problems:
        raise CsvInputError(problems, np.array(lines))
    if not rows:
        raise CsvInputError([Problem("rows", "the CSV has a header but no data rows")])
    frame = pd.DataFrame(rows, columns=header, dtype="string")
    return frame.replace({"": pd.NA}), np.array(lines)


_THOUSANDS_SPLIT = re.compile(r"\d{1,3}")
_THOUSANDS_TAIL = re.compile(r"\d{3}(\.\d*)?")


def _ragged_message(row: list[str], header: list[str], delimiter: str) -> str:
    message = f"has {len(row)} fields, the header has {len(header)}"
    if len(row) > len(header) and delimiter == ",":
        for first, second in itertools.pairwise(row):
            if _THOUSANDS_SPLIT.fullmatch(first.strip()) and \
                    _THOUSANDS_TAIL.fullmatch(second.strip()):
                return (f"{message}: {first},{second} looks like a number written with a "
                        f"thousands separator, which splits it in two; write "
                        f"{first.strip()}{second.strip()}")
    return message


def _header_problems(header: list[str], text: str = "", delimiter: str = ","
                     ) -> list[Problem]:
    """What is wrong with the (stripped) header names: too many, required columns missing,
    repeats. Linear in the header's length (the column count is capped first)."""
    if len(header) > MAX_COLUMNS:
        return [Problem("header", f"has {len(header)} columns; at most {MAX_COLUMNS} are "
                        f"accepted (date, arm, source, entered and 3 per metric for at most "
                        f"{MAX_METRICS} metrics)")]
    problems: list[Problem] = []
    counts = Counter(header)
    for column in REQUIRED_COLUMNS:
        if column not in counts:
            problems.append(Problem("header", _missing_column_message(column, header, text,
                                                                      delimiter)))
    duplicated = sorted(c for c, count in counts.items() if count > 1)
    if duplicated:
        problems.append(Problem("header", f"repeated column(s): {', '.join(duplicated)}"))
    return problems


def _missing_column_message(column: str, header: list[str], text: str, delimiter: str) -> str:
    message = f"missing required column {column!r}"
    if len(header) == 1 and text:
        others = [_DELIMITER_NAMES[d] for d in DELIMITERS if d != delimiter and d in header[0]]
        if others:
            return (f"{message}: the header {header[0][:60]!r} is one field; fields separated "
                    f"by {' or '.join(others)} are read only when the header names date, arm "
                    "and entered")
        return f"{message}: the header {header[0][:60]!r} is one field"
    close = difflib.get_close_matches(column, header, n=1, cutoff=0.6)
    if not close:
        close = [name for name in header if name.lower() == column]
    if close:
        return f"{message}: found {close[0]!r}, rename it {column!r}"
    return f"{message} (the header has {', '.join(map(repr, header[:8]))})"


_METRIC_STAT = re.compile(
    r"(?P<name>.+?)[._\- ](?P<stat>n|count|cnt|sum|total|sum_?sq|sumsq|sum_?squares?|"
    r"sum_of_squares|ss|sq)", re.IGNORECASE)
_CANONICAL_STAT = {"n": "n", "count": "n", "cnt": "n", "sum": "sum", "total": "sum"}


def column_problems(header: list[str]) -> tuple[list[Problem], list[Problem]]:
    """Columns of the header that the contract does not define: ``(errors, unused)``.

    Errors: a column that looks like a metric statistic but is not written ``NAME.n``,
    ``NAME.sum``, ``NAME.sum_sq`` (it would be dropped in silence; a metric with only some of
    its three columns is :func:`detectors.data.validate_frame`'s to report).
    Unused: any other unknown column, with the close match to a known column when there is
    one (the API refuses these too; the command line warns).
    """
    errors: list[Problem] = []
    unused: list[Problem] = []
    for column in header:
        if column in BASE_COLUMNS:
            continue
        name, _, stat = column.rpartition(".")
        if name and stat in STATISTICS:
            continue
        match = _METRIC_STAT.fullmatch(column)
        if match:
            canonical = _CANONICAL_STAT.get(match["stat"].lower(), "sum_sq")
            errors.append(Problem("header", f"column {column!r} looks like a metric statistic "
                                  "but metrics are written NAME.n, NAME.sum, NAME.sum_sq: "
                                  f"rename it {match['name']}.{canonical}"))
            continue
        if "." in column:
            errors.append(Problem("header", f"column {column!r} looks like a metric column, "
                                  "but only NAME.n, NAME.sum and NAME.sum_sq are read (counts, "
                                  "sums and sums of squares per unit, not means or rates)"))
            continue
        close = difflib.get_close_matches(column.lower(), BASE_COLUMNS, n=1, cutoff=0.75)
        hint = (f"did you mean {close[0]!r}?" if close else "columns are date, arm, source, "
                "entered and NAME.n, NAME.sum, NAME.sum_sq per metric")
        unused.append(Problem("header", f"unknown column {column!r}: {hint}"))
    return errors, unused


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
    leaves its three cells empty. Arm and source cells that a spreadsheet would run as a
    formula are escaped (:func:`neutralise_cell`); the reader undoes it.
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
        cells = [row["date"], neutralise_cell(str(row["arm"])),
                 neutralise_cell(str(row["source"])), row["entered"]]
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
