"""JSON encoding of documents, without any web framework (the offline CLI uses it too).

msgspec does the encoding: several times faster than the standard library on the large
diagnosis and series documents of wide experiments, and it writes non-finite floats as
``null`` (JSON has no NaN), which is what :func:`json_safe` promises.
"""

from __future__ import annotations

import math
from typing import Any

import msgspec

_ENCODER = msgspec.json.Encoder()
_SORTED_ENCODER = msgspec.json.Encoder(order="sorted")


def json_safe(value: Any) -> Any:
    """``value`` as plain JSON data: non-finite floats become ``None``, tuples lists and keys
    strings (a copy; the input is left alone).

    Example:
        >>> json_safe({"p": float("nan"), 3: (1.5, 2)})
        {'p': None, '3': [1.5, 2]}
    """
    try:
        return msgspec.json.decode(_ENCODER.encode(value))
    except TypeError:  # a type JSON does not know: copy what JSON does know, leave the rest
        return _json_safe_copy(value)


def encode_json(value: Any) -> bytes:
    """Compact JSON bytes of ``value`` (non-finite floats as ``null``)."""
    return _ENCODER.encode(value)


def canonical_json(document: Any) -> bytes:
    """Compact JSON with keys sorted at every level: the same bytes for equal documents.

    Example:
        >>> canonical_json({"b": 1, "a": {"d": 2.5, "c": None}})
        b'{"a":{"c":null,"d":2.5},"b":1}'
    """
    try:
        return _SORTED_ENCODER.encode(document)
    except TypeError:  # keys that are not strings: sort the JSON form
        return _SORTED_ENCODER.encode(json_safe(document))


def _json_safe_copy(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _json_safe_copy(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe_copy(v) for v in value]
    return value
