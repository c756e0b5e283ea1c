"""Plain, JSON-ready values from results that hold numpy scalars and arrays."""

from __future__ import annotations

import enum
import math

import numpy as np


def plain(obj):
    """``obj`` with numpy values turned into Python ones and non-finite floats into None."""
    # the built-in scalars first, by exact type (most of a reply or a state snapshot): the
    # same values as the general checks below give them, without the chain of isinstance
    kind = type(obj)
    if kind is str or kind is int or kind is bool or obj is None:
        return obj
    if kind is float:
        return obj if math.isfinite(obj) else None
    if isinstance(obj, dict):
        return {str(k): plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return plain(obj.tolist())
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, enum.Enum):
        return obj.value
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    return obj
