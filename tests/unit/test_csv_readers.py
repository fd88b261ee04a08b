"""The fast CSV reader (``service.csvio.plain_csv``, pandas' C parser) and the strict one
(``strict_csv``, the standard library's ``csv`` module) lead to the same validated rows or the
same problems (``detectors.data.validate_frame``); the fast one declines what it cannot read
exactly as the strict one would."""

from __future__ import annotations

import datetime as dt

import numpy as np
import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st

from detectors.data import validate_frame
from detectors.errors import InputError
from service.csvio import plain_csv, read_observations_csv, strict_csv

ARMS = ["control", "cards"]
START = dt.date(2026, 3, 1)
HEADER = "date,arm,source,entered,hikes.n,hikes.sum,hikes.sum_sq"


def _validated(frame: pd.DataFrame) -> tuple[str, object]:
    try:
        clean, names = validate_frame(frame, ARMS, start=START)
    except InputError as error:
        return "problems", [(p.row, p.field, p.message) for p in error.problems]
    return "rows", (clean.to_dict("list"), names)


def _same(text: str) -> None:
    fast = plain_csv(text)
    if fast is not None:
        assert _validated(fast) == _validated(strict_csv(text))


def test_a_plain_file_takes_the_fast_path_and_keeps_every_digit() -> None:
    rows = [f"2026-03-0{d},{arm},organic,{100 + d},{90 + d},{0.1 + d / 3!r},{1 / 3 + d!r}"
            for d in range(1, 8) for arm in ARMS]
    text = HEADER + "\n" + "\n".join(rows) + "\n"
    fast = plain_csv(text)
    assert fast is not None
    assert fast["hikes.sum"].tolist() == [0.1 + d / 3 for d in range(1, 8) for _ in ARMS]
    _same(text)
    assert read_observations_csv(text.encode()).shape == (14, 7)


def test_what_the_fast_reader_declines() -> None:
    good = "2026-03-02,cards,organic,5,4,2.5,7"
    for text in (
        f'{HEADER}\n2026-03-02,cards,"organic",5,4,2.5,7\n',  # quotes
        f"{HEADER}\n{good}\n\n{good}\n",  # a blank line
        f"{HEADER}\n{good},9\n",  # ragged
        f"{HEADER}\n2026-03-02,cards,organic,5\n",  # short row
        f"{HEADER}\n2026-03-02,cards,organic,five,4,2.5,7\n",  # not a number
        "date,arm,arm,entered\n2026-03-02,cards,cards,4\n",  # repeated column
        "date,entered\n2026-03-02,4\n",  # required column missing
        f"{HEADER}\n",  # no data rows
        f"{HEADER}\n2026-03-02,cards,organic,99999999999999999999,4,2.5,7\n",  # beyond int64
    ):
        assert plain_csv(text) is None, text


cells = st.one_of(st.sampled_from(["", "0", "3", "12", "2.5", "-1", "1e3", "7.0", "nan",
                                   "inf", "1_0", "0x10", "+4", ".5", "5.", "abc", " 3"]),
                  st.floats(allow_nan=False, allow_infinity=False).map(repr),
                  st.integers(-10, 10**6).map(str))
dates = st.sampled_from(["2026-03-02", "2026-03-03", "2026-02-27", "2026-3-4", "", "soon"])
arms = st.sampled_from(["control", "cards", "", "other", "Cards"])
sources = st.sampled_from(["organic", "", "push", " email ", "x" * 130])


@settings(max_examples=400, deadline=None)
@given(st.lists(st.tuples(dates, arms, sources, cells, cells, cells, cells), min_size=1,
                max_size=6), st.booleans())
def test_fast_and_strict_readers_validate_alike(rows: list[tuple[str, ...]],
                                                crlf: bool) -> None:
    end = "\r\n" if crlf else "\n"
    text = end.join([HEADER, *(",".join(row) for row in rows)]) + end
    _same(text)


def test_empty_cells_are_missing_in_both() -> None:
    text = f"{HEADER}\n2026-03-02,cards,,5,,,\n2026-03-02,control,organic,6,1,2.0,4.0\n"
    fast = plain_csv(text)
    assert fast is not None and np.isnan(fast["hikes.n"].iloc[0])
    assert pd.isna(fast["source"].iloc[0])
    _same(text)
