"""Shared pieces of the text readers: line counting, bulk number parsing, symbols.

Readers walk a file frame by frame in Python (a handful of header lines per
frame) and hand the atom lines of many frames at once to :func:`parse_columns`,
which converts them with one numpy call. Only when that call fails does a slow
pass look for the first bad line, so that the message can name it.

Frames and lines in messages are counted from 1, as a text editor shows them.
"""

from __future__ import annotations

import itertools
import warnings

import numpy as np

from ..errors import DiffkitWarning, InputError, UsageError

__all__ = ["LineSource", "BadLine", "CutOff", "parse_columns", "element_symbol",
           "normalize_type_map", "opened", "is_number_line", "chunk_frames", "warn", "LINE_BUDGET"]

#: Largest number of atom lines held in memory at once (bounds a chunk for big systems).
LINE_BUDGET = 500_000


def warn(message):
    """Issue a :class:`DiffkitWarning` pointing at the reader's caller."""
    warnings.warn(message, DiffkitWarning, stacklevel=3)


def chunk_frames(frames_per_chunk, n_atoms):
    """``frames_per_chunk``, capped so that a chunk holds at most LINE_BUDGET atom lines."""
    if int(frames_per_chunk) < 1:
        raise UsageError(f"frames_per_chunk must be >= 1, got {frames_per_chunk!r}")
    return max(1, min(int(frames_per_chunk), LINE_BUDGET // max(int(n_atoms), 1)))


class LineSource:
    """A text stream that counts the lines it has handed out.

    A last line without a newline is taken as cut off (every writer ends its
    lines): it is not handed out, and ``cut`` becomes True, so that the reader
    drops the frame it belongs to with a warning instead of reading a number cut
    short.

    Attributes
    ----------
    lineno : int
        Number of lines read so far (so the last line read is line ``lineno``, from 1).
    cut : bool
        The file ended in the middle of a (non-blank) line.
    """

    def __init__(self, stream, name):
        self._f = stream
        self.name = name
        self.lineno = 0
        self.cut = False

    def readline(self):
        """Next whole line with its newline, or ``""`` at the end of the file."""
        line = self._f.readline()
        if not line:
            return ""
        self.lineno += 1
        if not line.endswith("\n"):
            self.cut = bool(line.strip())
            return ""
        return line

    def take(self, n):
        """Up to ``n`` next whole lines (fewer only at the end of the file)."""
        lines = list(itertools.islice(self._f, n))
        self.lineno += len(lines)
        if lines and not lines[-1].endswith("\n"):
            self.cut = self.cut or bool(lines[-1].strip())
            lines.pop()
        return lines

    def next_nonblank(self):
        """Next line that is not blank, or ``""`` at the end of the file."""
        while True:
            line = self.readline()
            if not line or line.strip():
                return line


class BadLine(Exception):
    """Raised by :func:`parse_columns`: line ``index`` of the block cannot be used."""

    def __init__(self, index, reason):
        super().__init__(index, reason)
        self.index = index
        self.reason = reason


class CutOff(Exception):
    """The file ends inside a frame that starts at line ``lineno``."""

    def __init__(self, lineno, got, n=None, mid_line=False):
        super().__init__(lineno, got)
        self.lineno, self.got, self.n, self.mid_line = lineno, got, n, mid_line

    def how(self):
        """Where the frame ends, in words."""
        if self.n is None:
            return "the file ends in its header"
        tail = ", the last one cut mid-line" if self.mid_line else ""
        return f"the file ends after {self.got} of its {self.n} atom lines{tail}"


def parse_columns(lines, usecols, min_fields=None):
    """Parse the numeric columns ``usecols`` of text lines in one numpy call.

    Parameters
    ----------
    lines : list of str
        Data lines; other columns may hold anything but must be present.
    usecols : sequence of int
        Zero-based columns to convert to float.
    min_fields : int, optional
        Fewest whitespace-separated fields a line must have (default
        ``max(usecols) + 1``).

    Returns
    -------
    (len(lines), len(usecols)) float ndarray
        Every value finite.

    Raises
    ------
    BadLine
        For the first line that is short, holds text where a number belongs,
        or holds NaN/inf.
    """
    usecols = tuple(int(c) for c in usecols)
    if min_fields is None:
        min_fields = max(usecols) + 1
    if not lines:
        return np.empty((0, len(usecols)))
    values = _try_parse(lines, usecols)
    if values is not None:
        return values
    # find the first bad line by bisection: a few numpy calls on shrinking slices
    lo, hi = 0, len(lines)
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _try_parse(lines[lo:mid], usecols) is None:
            hi = mid
        else:
            lo = mid
    raise BadLine(lo, _reason(lines[lo], usecols, min_fields))


def _try_parse(lines, usecols):
    """The parsed block, or None when any line is short, non-numeric, blank or not finite."""
    try:
        values = np.loadtxt(lines, dtype=np.float64, usecols=usecols, comments=None, ndmin=2)
    except ValueError:
        return None
    if values.shape[0] != len(lines) or not np.isfinite(values).all():
        return None
    return values


def _reason(line, usecols, min_fields):
    """Say what is wrong with one line that numpy refused."""
    fields = line.split()
    text = line.strip()[:80]
    if len(fields) < min_fields:
        return f"{len(fields)} fields, expected at least {min_fields}: {text!r}"
    for c in usecols:
        try:
            x = float(np.float64(fields[c]))
        except ValueError:
            return f"column {c + 1} is not a number: {fields[c][:40]!r}"
        if not np.isfinite(x):
            return f"value is not a finite number: {text!r}"
    return f"cannot read the numbers of this line: {text!r}"


def element_symbol(name):
    """The element symbol of ``name`` (``"Li"``, ``"Li_sv"``, ``"Li_sv/2a1b"``), or None.

    The dummy symbol ``"X"`` is not an element.
    """
    from ase.data import atomic_numbers

    name = name.strip()
    for sep in ("_", "/", ":"):
        name = name.split(sep, 1)[0]
    if name in atomic_numbers and name != "X":
        return name
    return None


def normalize_type_map(type_map, source):
    """Check a user ``type_map`` (atom type -> element symbol); keys may be ints or digit strings.

    Returns
    -------
    dict of int -> str, or None
    """
    if type_map is None:
        return None
    out = {}
    for key, value in dict(type_map).items():
        try:
            k = int(key)
        except (TypeError, ValueError):
            raise InputError(f"{source}: type_map key {key!r} is not an integer atom "
                             "type") from None
        sym = element_symbol(str(value))
        if sym is None or sym != str(value).strip():
            raise InputError(f"{source}: type_map maps type {k} to {value!r}, "
                             "which is not an element symbol")
        out[k] = sym
    return out


class opened:
    """Context manager: ``with opened(path_or_file) as (stream, name)``.

    Opens a path with :func:`diffkit.io.open_text` and closes it afterwards; an
    open file given by the caller is left open.
    """

    def __init__(self, path_or_file):
        self._arg = path_or_file
        self._stream = None

    def __enter__(self):
        from . import open_text, source_name

        self._stream = open_text(self._arg)
        return self._stream, source_name(self._arg)

    def __exit__(self, *exc):
        import os

        if isinstance(self._arg, (str, os.PathLike)):
            self._stream.close()
        elif self._stream is not self._arg:
            # a text wrapper we put around the caller's binary file: let go of it unclosed
            try:
                self._stream.detach()
            except (ValueError, AttributeError):  # pragma: no cover - already detached
                pass
        return False


def is_number_line(line, n_fields):
    """True when ``line`` holds exactly ``n_fields`` numbers."""
    fields = line.split()
    if len(fields) != n_fields:
        return False
    try:
        for x in fields:
            float(x)
    except ValueError:
        return False
    return True
