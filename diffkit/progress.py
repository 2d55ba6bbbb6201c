"""A plain progress bar for long steps; silent when stderr is not a terminal.

Library functions take an optional ``progress`` callable; the command line
passes a :class:`ProgressBar`. Nothing here computes physics.
"""

from __future__ import annotations

import sys
import time

__all__ = ["ProgressBar"]


class ProgressBar:
    """Draw ``label [#####.....] done/total`` on stderr, at most ten times a second.

    Parameters
    ----------
    label : str
    total : int or None
        Expected count; None draws a counter only.
    unit : str
        What is counted (``"frames"``, ``"atoms"``, ``"runs"``).
    enabled : bool or None
        None: only when stderr is a terminal.
    """

    def __init__(self, label, total=None, unit="", enabled=None, stream=None):
        self.stream = stream or sys.stderr
        if enabled is None:
            enabled = bool(getattr(self.stream, "isatty", lambda: False)())
        self.enabled = enabled
        self.label, self.total, self.unit = label, total, unit
        self._last = 0.0
        self._shown = False

    def __call__(self, done, total=None):
        if total is not None:
            self.total = total
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self._last < 0.1 and not (self.total and done >= self.total):
            return
        self._last = now
        if self.total:
            frac = min(1.0, done / self.total)
            bar = "#" * int(30 * frac) + "." * (30 - int(30 * frac))
            text = f"\r{self.label} [{bar}] {done}/{self.total} {self.unit}"
        else:
            text = f"\r{self.label} {done} {self.unit}"
        self.stream.write(text)
        self.stream.flush()
        self._shown = True

    def close(self):
        """Clear the bar's line."""
        if self.enabled and self._shown:
            self.stream.write("\r" + " " * 79 + "\r")
            self.stream.flush()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
