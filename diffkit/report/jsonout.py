"""Turn result objects into JSON-ready data (units stay in the key names)."""

from __future__ import annotations

import dataclasses
import math

import numpy as np

__all__ = ["to_jsonable"]


def to_jsonable(obj):
    """Recursively convert results, arrays and numpy scalars; NaN and inf become None."""
    if hasattr(obj, "to_dict") and not isinstance(obj, type):
        return to_jsonable(obj.to_dict())
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return to_jsonable(dataclasses.asdict(obj))
    if isinstance(obj, dict):
        return {str(k): to_jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [to_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return to_jsonable(obj.tolist())
    if isinstance(obj, np.generic):
        return to_jsonable(obj.item())
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    return obj
