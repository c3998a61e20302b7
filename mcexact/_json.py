"""Conversion of results to plain, JSON-serialisable Python."""

from __future__ import annotations

import math

import numpy as np

__all__ = ["plain"]


def plain(value):
    """Numpy scalars and arrays to Python, non-finite floats to ``None`` (NaN) or the strings
    ``"inf"`` / ``"-inf"``, recursively through dicts, lists and tuples."""
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return [plain(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        if math.isnan(value):
            return None
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
    return value
