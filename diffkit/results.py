"""Shared helpers for result objects (frozen dataclasses with ``to_dict()``)."""

from __future__ import annotations

import math
from dataclasses import fields, is_dataclass

import numpy as np

__all__ = ["to_plain", "frozen_array"]


def to_plain(obj, _top=True):
    """Turn a result (dataclass, arrays, numpy scalars) into JSON-ready Python objects.

    Non-finite floats become ``None`` (JSON has no NaN). A dataclass may add
    derived, unit-named entries through a ``_named_values()`` method. Nested
    results that define ``to_dict()`` are converted with it, so a result looks
    the same on its own and inside another.
    """
    if not _top and hasattr(obj, "to_dict") and not isinstance(obj, type):
        return to_plain(obj.to_dict())
    if is_dataclass(obj) and not isinstance(obj, type):
        out = {f.name: to_plain(getattr(obj, f.name), False) for f in fields(obj)
               if not f.name.startswith("_")}
        extra = getattr(obj, "_named_values", None)
        if extra is not None:
            out.update({k: to_plain(v, False) for k, v in extra().items()})
        return out
    if hasattr(obj, "to_dict") and not isinstance(obj, type):
        return to_plain(obj.to_dict())
    if isinstance(obj, np.ndarray):
        return [to_plain(v, False) for v in obj.tolist()]
    if isinstance(obj, (list, tuple)):
        return [to_plain(v, False) for v in obj]
    if isinstance(obj, dict):
        return {str(k): to_plain(v, False) for k, v in obj.items()}
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    return obj


def frozen_array(values, dtype=float):
    """A read-only numpy copy of ``values`` (for fields of frozen results)."""
    arr = np.array(values, dtype=dtype)
    arr.setflags(write=False)
    return arr
