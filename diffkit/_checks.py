"""Small argument checks shared by the analysis modules (messages name the argument)."""

from __future__ import annotations

import math

from .errors import InputError

__all__ = ["positive_number"]


def positive_number(name, value, *, allow_zero=False):
    """``value`` as a finite float > 0 (≥ 0 with ``allow_zero``), else an InputError naming it."""
    try:
        v = float(value)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name}: expected a number, got {value!r}") from exc
    if not math.isfinite(v) or v < 0 or (v == 0 and not allow_zero):
        need = "≥ 0" if allow_zero else "> 0"
        raise InputError(f"{name}: expected a finite value {need}, got {value!r}")
    return v
