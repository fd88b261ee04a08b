"""The observation cube: validated daily counts and metric sufficient statistics per arm and source.

Every detector works on an :class:`ObservationTable`, a dense ``(day, arm, source)`` array built
once from the rows of the data contract. Building it validates every row and raises
:class:`~detectors.errors.InputError` listing all problems, so nothing is silently dropped.
"""

from __future__ import annotations

import datetime as dt
import difflib
import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .errors import InputError, Problem

UNATTRIBUTED = "unattributed"
STAT_FIELDS = ("n", "sum", "sum_sq")
METRIC_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]{0,63}$")
# Metrics one experiment may carry: each adds three columns to every read of its rows and
# three arguments to the statements that store them, and databases cap both (SQLite's result
# sets at 2,000 columns, PostgreSQL's functions at 100 arguments).
MAX_METRICS = 64
# Most units one experiment (and so one row) may hold: far beyond any real experiment, and
# far below 2^53, so every count and total stays exact in float64 and the log-gamma terms of
# the anytime-valid test keep their precision.
MAX_UNITS = 10**12
# Largest magnitude of a metric statistic: every total and square the detectors form from
# them stays finite.
MAX_STAT_MAGNITUDE = 1e100
# Relative slack for sum_sq >= sum^2/n: exports round floating sums.
_SUMSQ_RTOL = 1e-9


@dataclass(frozen=True, eq=False)
class ObservationTable:
    """Dense daily data of one experiment.

    Attributes:
        arms: arm names, the first is the reference arm.
        dates: the contiguous day axis (``datetime64[D]``); days without rows hold zeros.
        sources: entry sources, sorted.
        entered: units entered, ``int64`` array of shape ``(days, arms, sources)``.
        metrics: per metric name, ``float64`` array ``(days, arms, sources, 3)`` holding
            ``n, sum, sum_sq`` of the per-unit metric.

    Example:
        >>> rows = pd.DataFrame({"date": ["2026-03-01"] * 2, "arm": ["control", "variant"],
        ...                      "source": ["organic"] * 2, "entered": [100, 104]})
        >>> table = ObservationTable.from_frame(rows, arms=["control", "variant"])
        >>> table.entered.shape
        (1, 2, 1)
    """

    arms: tuple[str, ...]
    dates: np.ndarray
    sources: tuple[str, ...]
    entered: np.ndarray
    metrics: dict[str, np.ndarray] = field(default_factory=dict)

    @property
    def n_days(self) -> int:
        return int(self.dates.shape[0])

    @property
    def daily_totals(self) -> np.ndarray:
        """Units per day and arm, ``(days, arms)``."""
        return self.entered.sum(axis=2)

    def date_list(self) -> list[dt.date]:
        return [d.item() for d in self.dates]

    def select(self, *, sources: Sequence[str] | None = None,
               day_mask: np.ndarray | None = None) -> ObservationTable:
        """A table restricted to some sources and/or days (``day_mask`` over the day axis)."""
        source_index = (np.arange(len(self.sources)) if sources is None
                        else np.array([self.sources.index(s) for s in sources], dtype=int))
        days = np.ones(self.n_days, bool) if day_mask is None else np.asarray(day_mask, bool)
        return ObservationTable(
            arms=self.arms,
            dates=self.dates[days],
            sources=tuple(self.sources[i] for i in source_index),
            entered=self.entered[days][:, :, source_index],
            metrics={k: v[days][:, :, source_index] for k, v in self.metrics.items()},
        )

    @classmethod
    def from_records(cls, rows: Iterable[Mapping[str, object]], arms: Sequence[str], *,
                     start: dt.date | None = None, end: dt.date | None = None
                     ) -> ObservationTable:
        """Build from JSON-style rows ``{date, arm, source, entered, metrics: {name: {...}}}``."""
        return cls.from_frame(records_to_frame(rows), arms, start=start, end=end)

    @classmethod
    def from_frame(cls, frame: pd.DataFrame, arms: Sequence[str], *,
                   start: dt.date | None = None, end: dt.date | None = None
                   ) -> ObservationTable:
        """Validate rows in the flat layout (``date, arm, source, entered, NAME.n, ...``)."""
        arms = tuple(arms)
        clean, metric_names = validate_frame(frame, arms, start=start, end=end)
        return cls.from_cells(
            arms, clean["date"].to_numpy().astype("datetime64[D]"), clean["arm"].to_numpy(),
            clean["source"].to_numpy(), clean["entered"].to_numpy(np.int64),
            {name: clean[[f"{name}.{s}" for s in STAT_FIELDS]].to_numpy(float)
             for name in metric_names},
            start=start, end=end)

    @classmethod
    def from_cells(cls, arms: Sequence[str], days: np.ndarray, arm: np.ndarray,
                   source: np.ndarray, entered: np.ndarray, metrics: Mapping[str, np.ndarray],
                   *, start: dt.date | None = None, end: dt.date | None = None
                   ) -> ObservationTable:
        """Assemble the cube from rows that are valid already (no checks are repeated).

        One entry per row: ``days`` (``datetime64[D]``), ``arm`` and ``source`` names,
        ``entered`` counts, and per metric an ``(rows, 3)`` array of ``n, sum, sum_sq``.
        Rows sharing a key are summed. Use :meth:`from_frame` for data not yet validated.

        Example:
            >>> table = ObservationTable.from_cells(
            ...     ["control", "variant"], np.array(["2026-03-01"] * 2, "datetime64[D]"),
            ...     np.array(["control", "variant"]), np.array(["organic"] * 2),
            ...     np.array([100, 104]), {})
            >>> table.entered[0, :, 0].tolist()
            [100, 104]
        """
        arms = tuple(arms)
        row_days = np.asarray(days, dtype="datetime64[D]")
        first = np.datetime64(start, "D") if start is not None else row_days.min()
        last = row_days.max()
        if end is not None:
            last = max(last, np.datetime64(end, "D"))
        dates = np.arange(first, last + np.timedelta64(1, "D"), dtype="datetime64[D]")
        sources_found, source_index = np.unique(np.asarray(source, dtype=str),
                                                return_inverse=True)
        sources = tuple(str(s) for s in sources_found)
        day_index = (row_days - first).astype(np.int64)
        arm_index = pd.Categorical(arm, categories=arms).codes.astype(np.int64)
        shape = (len(dates), len(arms), len(sources))
        cell = (day_index, arm_index, source_index.astype(np.int64))
        entered_cube = np.zeros(shape, dtype=np.int64)
        np.add.at(entered_cube, cell, np.asarray(entered, dtype=np.int64))
        cubes: dict[str, np.ndarray] = {}
        for name, values in metrics.items():
            cube = np.zeros((*shape, 3), dtype=float)
            np.add.at(cube, cell, np.asarray(values, dtype=float))
            cubes[name] = cube
        return cls(arms, dates, sources, entered_cube, cubes)


def metric_columns(columns: Iterable[str]) -> list[str]:
    """Metric names present in flat column names such as ``sessions.n``."""
    names: list[str] = []
    for column in columns:
        if "." in column:
            name, _, stat = column.rpartition(".")
            if stat in STAT_FIELDS and name not in names:
                names.append(name)
    return names


def records_to_frame(rows: Iterable[Mapping[str, object]]) -> pd.DataFrame:
    """Flatten JSON-style rows (nested ``metrics``) into the flat column layout.

    A metric missing on a row leaves its three cells empty (``None``), which
    :func:`validate_frame` reads as ``n = 0``.
    """
    rows = list(rows)
    empty: Mapping[str, object] = {}
    # Column by column: one pass per field instead of a dict per row.
    nested = [row.get("metrics") or empty for row in rows]
    problems = [Problem("metrics", "must be an object {name: {n, sum, sum_sq}}", index)
                for index, metrics in enumerate(nested) if not _is_mapping(metrics)]
    if problems:
        raise InputError(problems)
    names = list(dict.fromkeys(name for metrics in nested for name in metrics))  # type: ignore[union-attr]
    if len(names) > MAX_METRICS:  # before a column is built for each
        raise InputError([Problem("metrics", f"{len(names)} metrics; at most {MAX_METRICS} "
                                  "are accepted per experiment")])
    columns: dict[str, list[object]] = {
        key: [row.get(key) for row in rows] for key in ("date", "arm", "source", "entered")}
    for name in names:
        cells = [metrics.get(name, empty) for metrics in nested]  # type: ignore[union-attr]
        problems += [Problem(f"metrics.{name}", "must be an object {n, sum, sum_sq}", index)
                     for index, cell in enumerate(cells) if not _is_mapping(cell)]
        if not problems:
            for stat in STAT_FIELDS:
                columns[f"{name}.{stat}"] = [cell.get(stat) for cell in cells]  # type: ignore[union-attr]
    if problems:
        problems.sort(key=lambda p: p.row if p.row is not None else -1)
        raise InputError(problems)
    return pd.DataFrame(columns)


def _is_mapping(value: object) -> bool:
    # The exact-type test first: the abstract-class check costs a microsecond per cell.
    return type(value) is dict or isinstance(value, Mapping)


def validate_frame(frame: pd.DataFrame, arms: Sequence[str], *, start: dt.date | None = None,
                   end: dt.date | None = None) -> tuple[pd.DataFrame, list[str]]:
    """Check every row; return a normalised copy and the metric names, or raise InputError.

    Normalised: ``date`` as ``datetime64[D]``, missing ``source`` as ``unattributed``,
    ``entered`` as int64, metric stats as float (a metric absent on a row counts as ``n = 0``).
    """
    problems: list[Problem] = []
    if frame is None or len(frame) == 0:
        raise InputError([Problem("rows", "no observations: at least one row is needed")])
    frame = frame.reset_index(drop=True)
    for column in ("date", "arm", "entered"):
        if column not in frame.columns:
            problems.append(Problem(column, "required column is missing"))
    if problems:
        raise InputError(problems)
    names = metric_columns(frame.columns)
    if len(names) > MAX_METRICS:
        raise InputError([Problem("metrics", f"{len(names)} metrics; at most {MAX_METRICS} "
                                  "are accepted per experiment")])
    for name in names:
        if not METRIC_NAME.match(name):
            problems.append(Problem(f"{name}", "metric names are letters, digits and _"))
        for stat in STAT_FIELDS:
            if f"{name}.{stat}" not in frame.columns:
                problems.append(Problem(f"{name}.{stat}", "column is missing"))
    if problems:
        raise InputError(problems)

    def flag(mask: np.ndarray, column: str, message: str) -> None:
        for row in np.flatnonzero(mask):
            problems.append(Problem(column, message, int(row)))

    def flag_values(mask: np.ndarray, column: str, describe: Callable[[str], str],
                    numbers: np.ndarray | None = None) -> None:
        """One message per distinct offending cell, quoting it (``describe(cell text)``);
        a cell that reads as a number (``numbers``) is quoted as that number, so that the
        fast reader's numbers and the strict reader's text give the same message."""
        rows = np.flatnonzero(mask)
        if not rows.size:
            return
        cells = pd.Series([_cell_text(value, None if numbers is None else numbers[row])
                           for row, value in zip(rows, frame[column].iloc[rows], strict=True)],
                          dtype=object)
        messages = {text: describe(text) for text in cells.unique()}
        problems.extend(Problem(column, messages[text], int(row))
                        for row, text in zip(rows, cells, strict=True))

    raw_dates = frame["date"]
    as_text = raw_dates.astype("string").str.strip()
    # ASCII digits only: \\d would also take other scripts' digits (full-width ２０２６).
    well_written = as_text.str.fullmatch(r"[0-9]{4}-[0-9]{2}-[0-9]{2}").fillna(False) \
        .astype(bool)
    dates = pd.to_datetime(as_text.where(well_written), format="%Y-%m-%d", errors="coerce")
    flag_values(dates.isna().to_numpy(), "date", _date_message)
    day = dates.to_numpy().astype("datetime64[D]")
    if start is not None:
        flag(~np.isnat(day) & (day < np.datetime64(start, "D")), "date",
             f"is before the experiment's start {start.isoformat()}")
    if end is not None:
        flag(~np.isnat(day) & (day > np.datetime64(end, "D")), "date",
             f"is after the last accepted date {end.isoformat()}")

    arm = frame["arm"].astype("string")
    flag_values((~arm.isin(list(arms)) | arm.isna()).to_numpy(), "arm",
                lambda text: _arm_message(text, arms))

    if "source" in frame.columns:
        source = frame["source"].astype("string").str.strip().fillna("")
        source = source.mask(source == "", UNATTRIBUTED)
    else:
        source = pd.Series([UNATTRIBUTED] * len(frame), dtype="string")
    flag((source.str.len() > 128).to_numpy(), "source", "is longer than 128 characters")

    entered = _numeric(frame["entered"])
    bad_entered = ~np.isfinite(entered) | (entered < 0) | (entered != np.floor(entered))
    flag_values(bad_entered, "entered", lambda text: _count_message(text, "entered"), entered)
    # Checked on float64, where a count past 2^53 may be rounded: it is refused all the same,
    # never stored rounded.
    flag(np.isfinite(entered) & (entered > MAX_UNITS), "entered",
         f"is larger than {MAX_UNITS:,} (10^12), the most units an experiment holds")

    total = float(np.sum(entered, where=~bad_entered & (entered <= MAX_UNITS)))
    if total > MAX_UNITS:
        problems.append(Problem("entered", f"the rows enter {total:,.0f} units together; an "
                                f"experiment holds at most {MAX_UNITS:,} (10^12)"))

    clean = pd.DataFrame({"date": day, "arm": arm, "source": source,
                          "entered": np.where(bad_entered, 0, entered)})
    for name in names:
        stats = np.column_stack([_numeric(frame[f"{name}.{s}"]) for s in STAT_FIELDS])
        absent = np.isnan(stats).all(axis=1) & frame[[f"{name}.{s}" for s in STAT_FIELDS]] \
            .isna().all(axis=1).to_numpy()
        unreadable = np.zeros(len(frame), dtype=bool)
        for stat, column in zip(STAT_FIELDS, stats.T, strict=True):
            cells = frame[f"{name}.{stat}"]
            text = np.flatnonzero(np.isnan(column) & ~cells.isna().to_numpy())
            mask = np.zeros(len(frame), dtype=bool)  # text, not a number ("nan" is empty)
            mask[text] = [_cell_text(v, None) != "" for v in cells.iloc[text]]
            flag_values(mask, f"{name}.{stat}", _number_message)
            unreadable |= mask
        partial = ~absent & ~np.isfinite(stats).all(axis=1) & ~unreadable
        flag(partial, name, _partial_message(name, stats, partial))
        stats[absent] = 0.0
        n, total, total_sq = stats.T
        partial |= unreadable
        with np.errstate(invalid="ignore"):
            huge = ~partial & (np.abs(stats) > MAX_STAT_MAGNITUDE).any(axis=1)
        flag(huge, name, f"n, sum and sum_sq must lie within +-{MAX_STAT_MAGNITUDE:g}")
        ok = ~partial & ~huge
        flag_values(ok & ((n < 0) | (n != np.floor(n))), f"{name}.n",
                    lambda text: _count_message(text, "n"), n)
        flag(ok & ~bad_entered & (n > entered), f"{name}.n",
             "is larger than entered: a cohort cannot have more measured units than units")
        flag(ok & (n == 0) & ((total != 0) | (total_sq != 0)), name,
             "n is 0 so sum and sum_sq must be 0")
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            floor = np.where(n > 0, total * total / np.where(n > 0, n, 1), 0.0)
        with np.errstate(invalid="ignore"):
            below = total_sq < floor - _SUMSQ_RTOL * np.maximum(1.0, np.abs(floor))
        flag(ok & (n > 0) & below, f"{name}.sum_sq",
             "is below sum^2/n, which no set of numbers can give")
        for stat, column in zip(STAT_FIELDS, stats.T, strict=True):
            clean[f"{name}.{stat}"] = np.where(ok, column, 0.0)

    key_ok = ~np.isnat(day) & arm.isin(list(arms)).fillna(False).to_numpy()
    keys = clean.loc[key_ok, ["date", "arm", "source"]]
    duplicated = keys.duplicated(keep="first")
    for row in keys.index[duplicated.to_numpy()]:
        problems.append(Problem("date,arm,source", "repeats the key of an earlier row", int(row)))
    if problems:
        problems.sort(key=lambda p: (p.row if p.row is not None else -1, p.field))
        raise InputError(problems)
    clean["entered"] = clean["entered"].astype(np.int64)
    clean["arm"] = clean["arm"].astype(str)
    clean["source"] = clean["source"].astype(str)
    return clean, names


_THOUSANDS = re.compile(r"[+-]?\d{1,3}([,.' \u00a0\u202f]\d{3})+")
_DECIMAL_COMMA = re.compile(r"[+-]?\d+,\d+")


def _cell_text(value: object, number: float | None) -> str:
    """A cell as written, or as the number it reads as (shortest form); empty and NaN cells
    are ``""`` (the fast reader cannot tell them apart)."""
    if number is not None and not np.isnan(number):
        if np.isfinite(number) and float(number).is_integer() and abs(number) < 2**53:
            return str(int(number))
        return repr(float(number))
    if value is None or value is pd.NA or isinstance(value, float | np.floating):
        return ""
    text = str(value)
    return "" if text.strip().lower() in ("nan", "+nan", "-nan") else text


def _number_hint(text: str) -> str:
    """Why a cell is not a number, when it looks like one written for a spreadsheet."""
    stripped = text.strip()
    if _THOUSANDS.fullmatch(stripped):
        return f": drop the thousands separator ({re.sub(r'[^0-9+-]', '', stripped)})"
    if _DECIMAL_COMMA.fullmatch(stripped):
        return f": use a decimal point ({stripped.replace(',', '.')})"
    return ""


def _count_message(text: str, what: str) -> str:
    if not text:
        return f"{what} is empty: a whole number >= 0 is needed"
    return f"{text!r} is not a whole number >= 0{_number_hint(text)}"


def _date_message(text: str) -> str:
    if not text:
        return "the date is empty: write it YYYY-MM-DD"
    hint = ""
    for layout in ("%d/%m/%Y", "%m/%d/%Y", "%d.%m.%Y", "%Y/%m/%d", "%Y%m%d"):
        try:
            parsed = dt.datetime.strptime(text.strip(), layout).date()
        except ValueError:
            continue
        hint = f" (for {parsed.isoformat()}, write it so)"
        break
    return f"{text!r} is not a date written YYYY-MM-DD{hint}"


def _arm_message(text: str, arms: Sequence[str]) -> str:
    listed = ", ".join(arms)
    if not text:
        return f"the arm is empty: it must be one of {listed}"
    folded = {arm.casefold().replace("-", "_"): arm for arm in arms}
    close = folded.get(text.strip().casefold().replace("-", "_"))
    if close is None:
        matches = difflib.get_close_matches(text, list(arms), n=1, cutoff=0.6)
        close = matches[0] if matches else None
    hint = f": did you mean {close!r}?" if close is not None else ""
    return f"{text!r} is not one of the arms {listed}{hint}"


def _partial_message(name: str, stats: np.ndarray, partial: np.ndarray) -> str:
    empty = [f"{name}.{stat}" for stat, column in zip(STAT_FIELDS, stats.T, strict=True)
             if np.isnan(column[partial]).any()]
    return ("needs finite n, sum and sum_sq together"
            + (f" ({', '.join(empty)} empty on some rows)" if empty else ""))


def _number_message(text: str) -> str:
    return f"{text!r} is not a number{_number_hint(text)}"


def _numeric(series: pd.Series) -> np.ndarray:
    """Numbers as float; booleans and unparsable text become NaN (and are reported)."""
    if series.dtype == bool:
        return np.full(len(series), np.nan)
    if series.dtype == object and pd.api.types.infer_dtype(series, skipna=True) not in (
            "integer", "floating", "mixed-integer-float", "string", "empty"):
        # Mixed cells may hold booleans, which to_numeric would read as 0 and 1.
        series = series.map(lambda v: np.nan if isinstance(v, bool | np.bool_) else v)
    return pd.to_numeric(series, errors="coerce").to_numpy(dtype=float, na_value=np.nan)
