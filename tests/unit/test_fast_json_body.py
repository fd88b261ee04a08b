"""The fast reader of JSON observation bodies (``service.ingest._plain_rows``, msgspec) only
accepts bodies that the strict reader (``service.json_guard.strict_loads``) and the row model
(``ObservationIn``) accept, and builds exactly the frame the strict path builds from them. It
declines everything else, repeated member names above all (msgspec, like other fast parsers,
keeps the last value of a repeated member silently)."""

from __future__ import annotations

import json
from typing import Any

import pandas as pd
from hypothesis import given, settings
from hypothesis import strategies as st
from pydantic import TypeAdapter, ValidationError

from detectors.data import records_to_frame
from service.ingest import _plain_rows
from service.json_guard import JSONBodyError, strict_loads
from service.schemas.observations import ObservationIn

ROW = {"date": "2026-03-01", "arm": "cards", "source": "organic", "entered": 120,
       "metrics": {"hikes": {"n": 100, "sum": 240.5, "sum_sq": 810.25}}}
MODEL = TypeAdapter(list[ObservationIn])


def _strict_frame(body: bytes) -> pd.DataFrame | None:
    """The strict path's frame, or ``None`` where it refuses the body or a row."""
    try:
        document = strict_loads(body)
    except JSONBodyError:
        return None
    if not isinstance(document, dict) or set(document) != {"rows"} \
            or not isinstance(document["rows"], list) or not document["rows"]:
        return None
    try:
        MODEL.validate_python(document["rows"])
    except ValidationError:
        return None
    return records_to_frame(document["rows"])


def _agrees(body: bytes) -> bool:
    """Whether the fast reader agreed with the strict path (``False``: it declined)."""
    fast = _plain_rows(body, 10)
    if fast is None:
        return False
    strict = _strict_frame(body)
    assert strict is not None, body
    pd.testing.assert_frame_equal(fast, strict)
    return True


def test_ordinary_upload_takes_the_fast_path() -> None:
    rows = [ROW, {**ROW, "arm": "control", "metrics": None},
            {"date": "2026-03-02", "arm": "cards", "entered": 3.0, "source": None},
            {**ROW, "metrics": {"photos": {"n": 1, "sum": 2, "sum_sq": 4.5}}}]
    assert _agrees(json.dumps({"rows": rows}).encode())


def test_repeated_members_anywhere_are_declined() -> None:
    for body in (
        b'{"rows": [], "rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1}]}',
        b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1, "entered": 2}]}',
        b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1, "metrics": '
        b'{"hikes": {"n": 1, "sum": 1, "sum_sq": 1}, "hikes": {"n": 1, "sum": 2, "sum_sq": 4}}}]}',
        b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1, "metrics": '
        b'{"hikes": {"n": 1, "sum": 1, "sum": 3, "sum_sq": 1}}}]}',
        b'{"rows": [{"date": "2026-03-01", "arm": "cards", "source": null, "source": "a", '
        b'"entered": 1}]}',
    ):
        assert _plain_rows(body, 10) is None
        assert _strict_frame(body) is None


def test_colons_inside_strings_and_escapes_only_cost_the_fast_path() -> None:
    for row in ({**ROW, "source": "partner:trail-news"}, {**ROW, "source": "caf\u00e9 \"x\""}):
        body = json.dumps({"rows": [row]}).encode()
        assert _plain_rows(body, 10) is None
        assert _strict_frame(body) is not None


def test_too_many_rows_and_other_shapes_are_left_to_the_strict_reader() -> None:
    assert _plain_rows(json.dumps({"rows": [ROW] * 3}).encode(), 2) is None
    for body in (b'{"rows": []}', b'{"rows": {}}', b'[]', b'{"rows": [1]}',
                 b'{"rows": [], "extra": 1}', b'\xef\xbb\xbf{"rows": []}', b'{"rows": [NaN]}',
                 b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": true}]}',
                 b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": "1"}]}',
                 b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1, "x": 1}]}'):
        assert _plain_rows(body, 10) is None


members = st.sampled_from([
    '"date": "2026-03-01"', '"date": 20260301', '"arm": "cards"', '"arm": "control"',
    '"arm": null', '"source": "organic"', '"source": null', '"source": ""',
    '"source": "' + "s" * 129 + '"', '"entered": 3', '"entered": 4.0', '"entered": -2',
    '"entered": true', '"entered": 1e400', '"entered": 123456789012345678901234567890',
    '"metrics": null', '"metrics": {}', '"metrics": 3',
    '"metrics": {"hikes": {"n": 1, "sum": 2.5, "sum_sq": 7}}',
    '"metrics": {"hikes": {"n": 1, "sum": 2.5}}',
    '"metrics": {"hikes": {"n": 1, "sum": 2.5, "sum_sq": 7, "mean": 1}}',
    '"metrics": {"hikes": {"n": 1, "sum": 2.5, "sum": 3, "sum_sq": 7}}',
    '"metrics": {"photos": {"n": 2, "sum": false, "sum_sq": 7}}',
    '"extra": 1', '"source": "a:b"'])


@settings(max_examples=600, deadline=None)
@given(st.lists(st.lists(members, min_size=0, max_size=7), min_size=0, max_size=4),
       st.booleans())
def test_fast_reader_agrees_with_the_strict_one(rows: list[list[str]], repeat_top: bool) -> None:
    text = '{"rows": [' + ", ".join("{" + ", ".join(row) + "}" for row in rows) + "]"
    if repeat_top:
        text += ', "rows": []'
    _agrees((text + "}").encode())


@settings(max_examples=300, deadline=None)
@given(st.lists(st.fixed_dictionaries(
    {"date": st.just("2026-03-01"), "arm": st.sampled_from(["cards", "control"]),
     "entered": st.one_of(st.integers(0, 10**6), st.floats(0, 1e6))},
    optional={"source": st.one_of(st.none(), st.sampled_from(["organic", "push", ""])),
              "metrics": st.one_of(st.none(), st.dictionaries(
                  st.sampled_from(["hikes", "photos"]), st.fixed_dictionaries(
                      {"n": st.integers(0, 100), "sum": st.floats(-1e9, 1e9),
                       "sum_sq": st.floats(0, 1e18)}), max_size=2))}), min_size=1, max_size=8))
def test_well_formed_uploads_take_the_fast_path(rows: list[dict[str, Any]]) -> None:
    assert _agrees(json.dumps({"rows": rows}).encode())
