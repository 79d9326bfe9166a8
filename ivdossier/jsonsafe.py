"""Conversion of results to JSON-safe values: infinities as "inf"/"-inf", NaN as null, datetimes as ISO text."""

from __future__ import annotations

import math
from collections.abc import Mapping
from datetime import datetime
from typing import Any


def json_safe(value: Any) -> Any:
    """Make a value JSON-safe, recursing into mappings, sequences and objects with ``to_dict()``."""
    if isinstance(value, bool) or value is None or isinstance(value, int | str):
        return value
    if isinstance(value, float):
        if math.isnan(value):
            return None
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return value
    if isinstance(value, Mapping):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [json_safe(v) for v in value]
    if isinstance(value, datetime):
        return value.isoformat()
    if hasattr(value, "to_dict"):
        return json_safe(value.to_dict())
    if hasattr(value, "tolist"):  # numpy arrays and scalars
        return json_safe(value.tolist())
    return value
