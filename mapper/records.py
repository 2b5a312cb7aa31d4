"""Conversions shared by every layer: records to plain JSON-ready values.

One JSON conversion for the whole package: numpy scalars become Python numbers, NaN and
infinities become ``None``, tuples and arrays become lists, anything else its text.
"""

from __future__ import annotations

import math
import sys

__all__ = ["plain"]


def plain(value):
    """A JSON-ready value: numpy scalars to Python, NaN to None, arrays to lists."""
    np = sys.modules.get("numpy")  # not loaded (a quick command): no value can be a numpy one
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)) or (np is not None and isinstance(value, np.ndarray)):
        return [plain(v) for v in value]
    if np is not None and isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if value is not None and not isinstance(value, (str, int, float, bool)):
        try:
            import pandas as pd
            if pd.isna(value):
                return None
        except (TypeError, ValueError):
            pass
        return str(value)
    return value
