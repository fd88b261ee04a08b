"""Header checks of the CSV readers: linear in the header's length, capped in width."""

from __future__ import annotations

import pytest

from detectors.errors import InputError
from service.csvio import MAX_COLUMNS, _header_problems, plain_csv, strict_csv


def test_repeats_and_missing_columns_are_named_once_each() -> None:
    problems = _header_problems(["date", "arm", "arm", "x", "x", "x"])
    assert [p.message.split(" (")[0] for p in problems] == [
        "missing required column 'entered'", "repeated column(s): arm, x"]


def test_the_widest_accepted_header_passes() -> None:
    header = ["date", "arm", "source", "entered"] + [f"c{i}" for i in range(MAX_COLUMNS - 4)]
    assert _header_problems(header) == []
    assert "at most" in _header_problems([*header, "one_more"])[0].message


@pytest.mark.timeout(30)
def test_a_huge_header_is_refused_by_both_readers_without_reading_rows() -> None:
    # 2 million empty names: the pairwise count took hours; rows after it are never parsed.
    text = "date,arm,entered" + "," * 2_000_000 + "\n" + "x\n" * 100_000
    assert plain_csv(text) is None
    with pytest.raises(InputError) as caught:
        strict_csv(text)
    [problem] = caught.value.problems
    assert problem.field == "header"
    assert f"has 2000003 columns; at most {MAX_COLUMNS} are accepted" in problem.message
