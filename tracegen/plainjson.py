"""Values as strict JSON: numpy scalars and arrays unwrapped, keys as text, non-finite numbers as null."""

from __future__ import annotations

import math
from typing import Any

import numpy as np


def plain(value: Any, *, digits: int | None = None, inf_as_text: bool = False) -> Any:
    """``value`` made JSON-safe, recursively: dict keys as strings, tuples and arrays as lists, numpy
    scalars as Python ones, NaN as None, infinities as None (or "inf"/"-inf" with ``inf_as_text``),
    floats rounded to ``digits`` decimals when given."""
    if isinstance(value, dict):
        return {str(k): plain(v, digits=digits, inf_as_text=inf_as_text) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v, digits=digits, inf_as_text=inf_as_text) for v in value]
    if isinstance(value, np.ndarray):
        return plain(value.tolist(), digits=digits, inf_as_text=inf_as_text)
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isinf(v):
            return ("inf" if v > 0 else "-inf") if inf_as_text else None
        if not math.isfinite(v):
            return None
        return float(round(v, digits)) if digits is not None else v
    if isinstance(value, np.generic):
        return value.item()
    return value


__all__ = ["plain"]
