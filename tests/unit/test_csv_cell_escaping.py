"""The export's formula escape and the reader's undoing of it are exact inverses."""

from __future__ import annotations

import pandas as pd
from hypothesis import given
from hypothesis import strategies as st

from service.csvio import neutralise_cell, read_observations_csv, restore_text_cells

TRIGGERS = "=+-@\t\r'"


@given(st.text(alphabet=st.sampled_from([*TRIGGERS, "a", "1", " "]), max_size=6))
def test_restoring_undoes_neutralising(value: str) -> None:
    escaped = neutralise_cell(value)
    # OWASP "CSV Injection": no exported text cell starts a formula.
    assert not escaped.startswith(("=", "+", "-", "@", "\t", "\r"))
    frame = pd.DataFrame({"arm": pd.Series([escaped], dtype="string")})
    assert restore_text_cells(frame)["arm"].tolist() == [value]


def test_the_reader_restores_arm_and_source_but_not_numbers_or_plain_text() -> None:
    text = ("date,arm,source,entered,km.n,km.sum,km.sum_sq\n"
            "2026-03-01,'-b,'@x,5,1,-1,1\n"
            "2026-03-01,a,'kept,5,1,-2.5,7\n")
    frame = read_observations_csv(text.encode())
    assert frame["arm"].tolist() == ["-b", "a"]
    assert frame["source"].tolist() == ["@x", "'kept"]
    assert frame["km.sum"].astype(float).tolist() == [-1.0, -2.5]
