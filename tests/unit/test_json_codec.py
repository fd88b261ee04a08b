"""The JSON codec of documents (msgspec) against the standard library's json as reference."""

from __future__ import annotations

import doctest
import json
import math

import pytest
from hypothesis import given
from hypothesis import strategies as st

from service import jsonsafe
from service.jsonsafe import canonical_json, encode_json, json_safe

# Documents as the diagnosis builds them: nested dicts and lists of str, int, float, bool, None.
scalars = st.one_of(st.none(), st.booleans(), st.integers(-2**53, 2**53), st.text(max_size=8),
                    st.floats(allow_nan=True, allow_infinity=True))
documents = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=6), inner, max_size=4)),
    max_leaves=30)


def _finite(value: object) -> object:
    """What the standard library gives after replacing non-finite floats by None."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value


@given(documents)
def test_json_safe_and_canonical_json_agree_with_the_standard_library(document: object) -> None:
    # Reference: Python's json module (sort_keys, allow_nan=False) on the NaN-free document.
    expected = _finite(document)
    assert json_safe(document) == expected
    assert json.loads(canonical_json(document)) == expected
    assert json.loads(encode_json(document)) == expected
    reference = json.dumps(expected, sort_keys=True, separators=(",", ":"), allow_nan=False)
    assert canonical_json(document) == canonical_json(json.loads(reference))


def test_canonical_json_sorts_keys_at_every_level_and_accepts_other_keys() -> None:
    assert canonical_json({"b": [{"y": 1, "x": 2}], "a": None}) == (
        b'{"a":null,"b":[{"x":2,"y":1}]}')
    assert canonical_json({2: 1.5, 1: (True,)}) == b'{"1":[true],"2":1.5}'


def test_json_safe_leaves_unknown_types_in_place() -> None:
    marker = object()
    copied = json_safe({"x": [marker, float("inf")]})
    assert copied == {"x": [marker, None]}


def test_docstring_examples() -> None:
    assert doctest.testmod(jsonsafe).failed == 0


@pytest.mark.parametrize("value", [1e16, 0.1, -0.0, 1 / 3, 2.0**-1074])
def test_floats_round_trip_exactly(value: float) -> None:
    assert json.loads(encode_json(value)) == value
