"""The fast reader of JSON observation bodies (``service.ingest._plain_document``) only ever
returns what the strict reader (``service.json_guard.strict_loads``) returns, and declines every
body the strict reader refuses, repeated member names above all (a fast parser keeps the last
value of a repeated member silently)."""

from __future__ import annotations

import json
from typing import Any

from hypothesis import given, settings
from hypothesis import strategies as st

from service.ingest import _plain_document
from service.json_guard import JSONBodyError, strict_loads

ROW = {"date": "2026-03-01", "arm": "cards", "source": "organic", "entered": 120,
       "metrics": {"hikes": {"n": 100, "sum": 240.5, "sum_sq": 810.25}}}


def _strict(body: bytes) -> Any:
    try:
        return strict_loads(body)
    except JSONBodyError:
        return JSONBodyError


def test_ordinary_upload_takes_the_fast_path() -> None:
    body = json.dumps({"rows": [ROW, {**ROW, "arm": "control", "metrics": None}]}).encode()
    assert _plain_document(body, 10) == strict_loads(body)


def test_repeated_members_anywhere_are_declined() -> None:
    for body in (
        b'{"rows": [], "rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1}]}',
        b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1, "entered": 2}]}',
        b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1, "metrics": '
        b'{"hikes": {"n": 1, "sum": 1, "sum_sq": 1}, "hikes": {"n": 1, "sum": 2, "sum_sq": 4}}}]}',
        b'{"rows": [{"date": "2026-03-01", "arm": "cards", "entered": 1, "metrics": '
        b'{"hikes": {"n": 1, "sum": 1, "sum": 3, "sum_sq": 1}}}]}',
    ):
        assert _plain_document(body, 10) is None
        assert _strict(body) is JSONBodyError


def test_colons_inside_strings_and_escapes_only_cost_the_fast_path() -> None:
    for row in ({**ROW, "source": "partner:trail-news"}, {**ROW, "source": "caf\u00e9 \"x\""}):
        body = json.dumps({"rows": [row]}).encode()
        assert _plain_document(body, 10) is None
        assert strict_loads(body) == {"rows": [row]}


def test_too_many_rows_and_other_shapes_are_left_to_the_strict_reader() -> None:
    assert _plain_document(json.dumps({"rows": [ROW] * 3}).encode(), 2) is None
    for body in (b'{"rows": []}', b'{"rows": {}}', b'[]', b'{"rows": [1]}',
                 b'{"rows": [], "extra": 1}', b'\xef\xbb\xbf{"rows": []}', b'{"rows": [NaN]}'):
        assert _plain_document(body, 10) is None


members = st.sampled_from(['"date": "2026-03-01"', '"arm": "cards"', '"arm": "control"',
                           '"source": "organic"', '"source": null', '"entered": 3',
                           '"entered": 4.0', '"metrics": null',
                           '"metrics": {"hikes": {"n": 1, "sum": 2.5, "sum_sq": 7}}',
                           '"metrics": {"hikes": {"n": 1, "sum": 2.5, "sum": 3, "sum_sq": 7}}',
                           '"extra": 1', '"source": "a:b"'])


@settings(max_examples=400, deadline=None)
@given(st.lists(st.lists(members, min_size=0, max_size=7), min_size=0, max_size=4),
       st.booleans())
def test_fast_reader_agrees_with_the_strict_one(rows: list[list[str]], repeat_top: bool) -> None:
    text = '{"rows": [' + ", ".join("{" + ", ".join(row) + "}" for row in rows) + "]"
    if repeat_top:
        text += ', "rows": []'
    body = (text + "}").encode()
    fast = _plain_document(body, 10)
    if fast is not None:
        assert fast == _strict(body)
