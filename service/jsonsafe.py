"""Documents made ready for JSON, without any web framework (the offline CLI uses it too)."""

from __future__ import annotations

import json
import math
from typing import Any


def json_safe(value: Any) -> Any:
    """``value`` ready for JSON: non-finite floats become ``None`` (JSON has no NaN).

    A document that JSON holds as it is (the common case) is returned itself, not copied.
    """
    try:
        json.dumps(value, allow_nan=False)
    except (ValueError, TypeError):
        return _json_safe_copy(value)
    return value


def _json_safe_copy(value: Any) -> Any:
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {str(k): _json_safe_copy(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe_copy(v) for v in value]
    return value
