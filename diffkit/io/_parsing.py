"""Shared pieces of the text readers: a byte-block line source, bulk number decoders, symbols.

Every reader has two paths over the same bytes:

- a **bulk path** that takes the bytes of many frames at once and converts all
  their numbers with a handful of numpy operations: :class:`FixedWidthLayout`
  for files whose numbers sit in fixed columns (XDATCAR, extended XYZ as ASE
  and diffkit write it) and :func:`decode_fields` for whitespace-separated
  fields of any width (LAMMPS ``%g``), and :func:`decode_spaced_fields`, the
  same with pyarrow's C++ CSV reader when pyarrow is installed (LAMMPS dumps,
  fields separated by single spaces). They only *recognise* text; anything
  unexpected (a stray character, a short line, a changed layout) makes them
  give up (return ``None``) rather than raise;
- a **careful path** that walks the same frames line by line with
  :class:`LineSource` and :func:`parse_columns`; it names the file, frame and
  line of any problem. Readers take it when the bulk path gives up, so that
  messages stay exact and the bulk path never decides what is an error.

Numbers come out bit-for-bit as a correctly rounded decimal parser (Python's
``float``, numpy's ``loadtxt``) gives them: a decimal number with at most 15
significant digits is an integer below 2**53 divided by a power of ten, both
exact in float64, and IEEE division rounds the quotient correctly. Numbers with
more digits, exponents or other spellings go through Python's ``float`` one by
one. pyarrow's reader rounds correctly as well (the tests compare it with
``float``).

Lines end at ``\\n`` (a ``\\r`` before it is whitespace). Frames and lines in
messages are counted from 1, as a text editor shows them.
"""

from __future__ import annotations

import io
import os
import re
import warnings

import numpy as np

from ..errors import DiffkitWarning, InputError, UsageError

__all__ = ["LineSource", "BadLine", "CutOff", "parse_columns", "element_symbol",
           "normalize_type_map", "opened", "is_number_line", "chunk_frames", "warn",
           "LINE_BUDGET", "FixedWidthLayout", "decode_fields", "field_codes", "text_codes",
           "lines_of", "in_parallel", "split_for_threads", "THREADS", "decode_spaced_fields",
           "fast_parse_available", "FAST_PARSE", "FAST_MIN_BYTES", "FAST_THREADS",
           "single_threaded"]

#: Largest number of atom lines held in memory at once (bounds a chunk for big systems).
LINE_BUDGET = 1 << 17
#: Bytes read from the file at a time (more when a chunk of frames needs it).
READ_BLOCK = 1 << 22
#: Threads that decode the numbers of a LAMMPS dump at the same time (numpy
#: releases the GIL while it works). 1 by default: on a busy machine a second
#: thread was measured to gain nothing, and process pools already fill the
#: cores. The environment variable DIFFKIT_READ_THREADS sets it.
try:
    THREADS = max(1, int(os.environ.get("DIFFKIT_READ_THREADS", "1")))
except ValueError:
    THREADS = 1
#: Whether pyarrow's CSV reader may use its own threads (LAMMPS dumps).
#: On by default: measured on an idle 2-core machine it read a 180 MB dump at 119 MB/s
#: against 86 MB/s with one thread. ``DIFFKIT_READ_THREADS=1`` turns it off, and so do
#: campaign workers (:func:`single_threaded`), whose processes already fill the cores.
FAST_THREADS = os.environ.get("DIFFKIT_READ_THREADS", "").strip() != "1"


def single_threaded():
    """Read with one thread in this process (for worker processes of a pool)."""
    global THREADS, FAST_THREADS
    THREADS, FAST_THREADS = 1, False
#: Fewest bytes worth splitting between threads.
_SPLIT_BYTES = 1 << 21
_POOL = None


def in_parallel(fn, jobs):
    """``[fn(*job) for job in jobs]``, the jobs spread over up to THREADS threads."""
    global _POOL
    jobs = list(jobs)
    if THREADS <= 1 or len(jobs) <= 1:
        return [fn(*job) for job in jobs]
    if _POOL is None:
        from concurrent.futures import ThreadPoolExecutor

        _POOL = ThreadPoolExecutor(max_workers=THREADS, thread_name_prefix="diffkit-read")
    futures = [_POOL.submit(fn, *job) for job in jobs[1:]]
    first = fn(*jobs[0])
    return [first] + [f.result() for f in futures]


def split_for_threads(n_items, n_bytes, unit=1):
    """Boundaries (list of (start, stop)) splitting ``n_items`` into parts for the threads.

    Parts hold whole multiples of ``unit`` items (frames); one part when the
    data is small or threads are off.
    """
    parts = THREADS if n_bytes >= _SPLIT_BYTES else 1
    groups = n_items // unit
    parts = max(1, min(parts, groups))
    edges = [unit * (groups * i // parts) for i in range(parts)] + [n_items]
    return [(a, b) for a, b in zip(edges[:-1], edges[1:]) if b > a]


def warn(message):
    """Issue a :class:`DiffkitWarning` pointing at the reader's caller."""
    warnings.warn(message, DiffkitWarning, stacklevel=3)


def chunk_frames(frames_per_chunk, n_atoms):
    """``frames_per_chunk``, capped so that a chunk holds at most LINE_BUDGET atom lines."""
    if int(frames_per_chunk) < 1:
        raise UsageError(f"frames_per_chunk must be >= 1, got {frames_per_chunk!r}")
    return max(1, min(int(frames_per_chunk), LINE_BUDGET // max(int(n_atoms), 1)))


# ----------------------------------------------------------------------------- the byte source
def _decode(raw):
    text = raw.decode("utf-8", "replace")
    if text.endswith("\r\n"):
        text = text[:-2] + "\n"
    return text


class LineSource:
    """A file read in large byte blocks, handed out as lines or as raw bytes.

    Parameters
    ----------
    stream : binary or text file object
        Read with ``stream.read(n)``; text is encoded back to UTF-8.
    name : str
        The file's name, for messages.

    The careful path uses :meth:`readline`, :meth:`take` and
    :meth:`next_nonblank` (lines as ``str``). The bulk path looks at ``buf``
    from ``pos`` after :meth:`fill`, and moves on with :meth:`consume` once it
    has understood a stretch of frames.

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
    buf : bytes or bytearray
        Bytes read from the file and not yet dropped; unread ones start at ``pos``.
    eof : bool
        Nothing is left in the file beyond ``buf``.
    """

    def __init__(self, stream, name):
        self._f = stream
        self._text = isinstance(stream, io.TextIOBase)
        self.name = name
        self.lineno = 0
        self.cut = False
        self.buf = b""
        self.pos = 0
        self.eof = False
        self.record = None  # a list to collect the lines handed out, when set

    def _read(self, n):
        data = self._f.read(n)
        if isinstance(data, str):
            data = data.encode("utf-8", "replace")
        return data or b""

    def fill(self, nbytes):
        """Make ``nbytes`` bytes available from ``pos`` on (fewer only at the end of the file).

        Drops the bytes before ``pos``; positions into ``buf`` taken before a
        call are no longer valid after it.
        """
        have = len(self.buf) - self.pos
        if have >= nbytes or self.eof:
            return
        # whole blocks, so that buffers of equal size come back (the allocator reuses them)
        size = -(-max(nbytes, have + READ_BLOCK) // READ_BLOCK) * READ_BLOCK
        readinto = None if self._text else getattr(self._f, "readinto", None)
        if readinto is None:
            parts = [self.buf[self.pos:]]
            while have < nbytes:
                data = self._read(max(nbytes - have, READ_BLOCK))
                if not data:
                    self.eof = True
                    break
                parts.append(data)
                have += len(data)
            self.buf = b"".join(parts)
        else:
            new = bytearray(size)
            view = memoryview(new)
            view[:have] = memoryview(self.buf)[self.pos:]
            while have < size:
                got = readinto(view[have:])
                if not got:
                    self.eof = True
                    break
                have += got
            view.release()
            del new[have:]
            self.buf = new
        self.pos = 0

    def consume(self, nbytes, nlines):
        """Move on by ``nbytes`` bytes holding ``nlines`` whole lines (after a bulk read)."""
        self.pos += nbytes
        self.lineno += nlines

    def readline(self):
        """Next whole line with its newline, or ``""`` at the end of the file."""
        i = self.buf.find(b"\n", self.pos)
        while i < 0 and not self.eof:
            start = len(self.buf) - self.pos
            self.fill(start + (1 << 16))
            i = self.buf.find(b"\n", self.pos + start)
        if i < 0:
            rest = self.buf[self.pos:]
            self.pos = len(self.buf)
            if not rest:
                return ""
            self.lineno += 1
            self.cut = bool(_decode(rest).strip())
            return ""
        raw = self.buf[self.pos:i + 1]
        self.pos = i + 1
        self.lineno += 1
        if self.record is not None:
            self.record.append(raw)
        return _decode(raw)

    def take(self, n):
        """Up to ``n`` next whole lines (fewer only at the end of the file)."""
        out = []
        for _ in range(n):
            line = self.readline()
            if not line:
                break
            out.append(line)
        return out

    def next_nonblank(self):
        """Next line that is not blank, or ``""`` at the end of the file."""
        while True:
            line = self.readline()
            if not line or line.strip():
                return line


def _open_binary(path_or_file):
    """A binary (or the caller's text) stream of a path or an open file, and whether we own it."""
    if not isinstance(path_or_file, (str, os.PathLike)):
        return path_or_file, False
    from . import open_path

    return open_path(path_or_file, text=False), True


class opened:
    """Context manager: ``with opened(path_or_file) as (source, name)``.

    ``source`` is a :class:`LineSource`. A path is opened (plain, gzip, bz2 or
    xz, told by content) and closed afterwards; an open file given by the caller
    is read as it is and left open.
    """

    def __init__(self, path_or_file):
        self._arg = path_or_file
        self._stream = None
        self._own = False

    def __enter__(self):
        from . import source_name

        self._stream, self._own = _open_binary(self._arg)
        name = source_name(self._arg)
        return LineSource(self._stream, name), name

    def __exit__(self, *exc):
        if self._own:
            self._stream.close()
        return False


# ----------------------------------------------------------------------------- careful parsing
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


# ----------------------------------------------------------------------------- bulk decoding
_POW10 = 10.0 ** np.arange(23)             # exact in float64 up to 1e22
_POW10_INT = 10 ** np.arange(20, dtype=np.uint64)
_TWO53 = 2 ** 53
_ASCII0 = np.uint64(0x3030303030303030)
_ABOVE_9 = np.uint64(0x4646464646464646)  # added to a byte: high bit set iff it is above '9'
#: _LOW[k]: the lowest k bytes of a little-endian uint64 (the first k characters).
_LOW = np.array([(1 << (8 * k)) - 1 for k in range(9)], dtype=np.uint64)
#: _HIGH[k]: the highest k bytes (the last k characters).
_HIGH = np.array([((1 << 64) - 1) ^ ((1 << (8 * (8 - k))) - 1) for k in range(9)],
                 dtype=np.uint64)
_NUMBER = re.compile(rb"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?")
#: _FILL[k]: ASCII '0' in every byte that _HIGH[k] does not keep.
_FILL = _ASCII0 & ~_HIGH


def _windows8(padded):
    """Overlapping little-endian uint64 views: element i holds bytes i .. i+7 of ``padded``."""
    n = len(padded) - 7
    return np.ndarray((max(n, 0),), dtype="<u8", buffer=padded, offset=0, strides=(1,))


#: added to bytes below 128: the high bit is set exactly where a byte is above 9
_BIG_DIGIT = np.uint64(0x7676767676767676)
_LOW7 = np.uint64(0x7F7F7F7F7F7F7F7F)
_SPACES = np.uint64(0xF0F0F0F0F0F0F0F0)  # ' ' minus '0', in every byte
_HIGH_BITS = np.uint64(0x8080808080808080)
_M1 = np.uint64(0x00FF00FF00FF00FF)
_M2 = np.uint64(0x0000FFFF0000FFFF)
_M3 = np.uint64(0xFFFFFFFF)
_BATCH = 16384  # tokens converted at a time (temporaries stay in cache)
_ROWS_PER_BLOCK = 32768  # fixed-width lines decoded at a time (likewise)


def _digits_before(W, at, keep, bad):
    """Value of the last ``keep`` (0..8) ASCII digits of the 8 bytes ending before ``at``.

    ``W`` are 8-byte little-endian windows (first character lowest); the bytes
    not kept count as '0'. ``bad`` (uint64 array) gets a high bit set wherever
    a kept byte is not a digit.
    """
    x = W[at]
    x &= _HIGH[keep]
    x |= _FILL[keep]           # '0' where not kept: no borrow below
    t = x + _ABOVE_9           # high bit where a byte is above '9'
    x -= _ASCII0               # high bit where a byte was below '0' (or not ASCII)
    t |= x
    t &= _HIGH_BITS
    bad |= t
    return _digit_bytes_value(x, t)


def _slow_numbers(data, starts, ends):
    """Python's float of each token, or None if a token is not a plain decimal number."""
    out = np.empty(len(starts))
    for i, (a, b) in enumerate(zip(starts.tolist(), ends.tolist())):
        tok = data[a:b]
        if _NUMBER.fullmatch(tok) is None:
            return None
        out[i] = float(tok)
    return out


def _decode_numbers(data, A, W, off, dp, ts, te):
    """Decimal tokens ``data[ts:te]`` as float64, or None if one is not a number.

    ``dp`` holds the position of each token's decimal point (``dp == te``:
    none), or is None for tokens expected to be integers. ``W`` are the 8-byte
    windows of ``A`` padded by ``off`` bytes in front. The digits before and
    after the point are read as up to 8 + 16 ASCII digits (three windows) and
    joined into one integer; anything else (an exponent, more digits, a stray
    character) is left to Python's ``float``.
    """
    n = len(ts)
    out = np.empty(n)
    slow_parts = []
    for a in range(0, n, _BATCH):
        b = min(n, a + _BATCH)
        s, e = ts[a:b], te[a:b]
        c0 = A[s]
        neg = c0 == 45
        sign = neg | (c0 == 43)
        bad = np.zeros(b - a, np.uint64)
        v = out[a:b]
        if dp is None:  # integers: at most 8 digits after an optional sign
            nid = e - s
            nid -= sign
            slow = (nid - 1).view(np.uint64) > 7  # not 1..8 digits
            np.clip(nid, 0, 8, out=nid)
            mant = _digits_before(W, e + (off - 8), nid, bad)
            slow |= bad != 0
            v[:] = mant
        else:
            d = dp[a:b]
            nid = d - s
            nid -= sign                      # digits before the point
            nfrac = e - d
            nfrac -= 1
            np.maximum(nfrac, 0, out=nfrac)  # digits after it
            slow = (nid - 1).view(np.uint64) > 7
            slow |= nfrac > 16
            np.clip(nid, 0, 8, out=nid)
            np.minimum(nfrac, 16, out=nfrac)
            mant = _digits_before(W, d + (off - 8), nid, bad)
            lo = _digits_before(W, e + (off - 8), np.minimum(nfrac, 8), bad)
            if (nfrac > 8).any():
                hi = _digits_before(W, e + (off - 16), np.clip(nfrac - 8, 0, 8), bad)
                hi *= 100000000
                lo += hi
            mant *= _POW10_INT[nfrac]
            mant += lo
            slow |= bad != 0
            slow |= mant >= _TWO53
            v[:] = mant
            v /= _POW10[nfrac]
        np.negative(v, out=v, where=neg)
        if slow.any():
            slow_parts.append(np.flatnonzero(slow) + a)
    if slow_parts:
        idx = np.concatenate(slow_parts)
        fix = _slow_numbers(data, ts[idx], te[idx])
        if fix is None or not np.isfinite(fix).all():
            return None
        out[idx] = fix
    return out


def _field_bounds(A, n_lines, n_fields):
    """(starts, ends) (n_lines, n_fields) of whitespace-separated fields and the newlines.

    Returns None unless every line holds exactly ``n_fields`` fields.
    """
    B = len(A)
    T = n_lines * n_fields
    sep = np.flatnonzero(A <= 32)
    if len(sep) == T and sep[0] > 0:
        # the usual layout: one space between fields, a newline after the last, nothing else
        kinds = A[sep].reshape(n_lines, n_fields)
        if ((kinds[:, :-1] == 32).all() and (kinds[:, -1] == 10).all()
                and (sep[1:] - sep[:-1] > 1).all()):
            st = np.empty(T, np.int64)
            st[0] = 0
            np.add(sep[:-1], 1, out=st[1:])
            en = sep.reshape(n_lines, n_fields)
            return st.reshape(n_lines, n_fields), en, en[:, -1]
    n_nl = int(np.count_nonzero(A == 10))
    if n_nl != n_lines:
        return None
    if int(np.count_nonzero(A < 32)) != n_nl:
        if ((A < 32) & (A != 9) & (A != 10) & (A != 13)).any():
            return None
        cr = np.flatnonzero(A == 13)  # only before a newline (the careful parser splits there)
        if cr.size and not (A[np.minimum(cr + 1, B - 1)] == 10).all():
            return None
        space = (A == 32) | (A == 9) | (A == 10) | (A == 13)
    else:
        space = A <= 32
    flag = np.empty(B + 1, bool)
    flag[0] = True
    flag[1:] = space
    edges = np.flatnonzero(flag[1:] != flag[:-1])
    if len(edges) != 2 * T:
        return None
    st = edges[0::2].reshape(n_lines, n_fields)
    en = edges[1::2].reshape(n_lines, n_fields)
    # with n_lines newlines in all, a newline after every line's last field leaves none inside
    last = en[:, -1]
    nl = np.flatnonzero(A == 10)
    if not (A[last] == 10).all():
        if not (np.array_equal(np.searchsorted(nl, last), np.arange(n_lines))
                and np.array_equal(np.searchsorted(nl, st[:, 0]), np.arange(n_lines))):
            return None
    return st, en, nl


def decode_fields(data, n_lines, n_fields, usecols, textcols=(), dotted=(), repeat=None,
                  frame_ends=None):
    """Whitespace-separated fields of ``n_lines`` lines, every line with ``n_fields`` fields.

    Parameters
    ----------
    data : bytes
        Exactly ``n_lines`` lines, each ending with ``\\n``.
    n_lines, n_fields : int
    usecols : sequence of int
        Columns to convert to float64.
    textcols : sequence of int
        Columns returned as codes (see :func:`text_codes`); at most 8 bytes each.
    dotted : sequence of int
        Columns of ``usecols`` whose numbers normally carry a decimal point, in
        increasing order; the others are read as integers first. A hint for
        speed only: any decimal number is read right in any column.
    repeat : (int, int), optional
        ``(lines_per_frame, n_lead)``: the lines come in frames, and the first
        ``n_lead`` fields of a line may be the same text in every frame (atom
        ids, types and names of a sorted LAMMPS dump). Where they are, they are
        read once. A hint for speed only.
    frame_ends : (n_frames,) int array, optional
        Where each frame ends in ``data`` (with ``repeat``): the lines must
        fall into frames of ``lines_per_frame`` lines exactly there.

    Returns
    -------
    (values, codes) or None
        ``values`` (n_lines, len(usecols)) float64, all finite; ``codes`` a
        list of (n_lines,) uint64 arrays, one per text column. None when the
        text is not exactly that (the careful parser then says what is wrong).
    """
    if not data or data[-1:] != b"\n" or n_lines < 1:
        return None
    A = np.frombuffer(data, np.uint8)
    if int(A.max()) >= 128:
        return None
    bounds = _field_bounds(A, n_lines, n_fields)
    if bounds is None:
        return None
    st, en, newlines = bounds
    if frame_ends is not None:
        per = repeat[0]
        if per * len(frame_ends) != n_lines or not np.array_equal(newlines[per - 1::per] + 1,
                                                                  frame_ends):
            return None
    off = 16
    padded = np.empty(len(A) + off + 32, np.uint8)
    padded[:off] = 32
    padded[off:off + len(A)] = A
    padded[off + len(A):] = 32
    W = _windows8(padded)
    usecols = list(usecols)
    values = np.empty((n_lines, len(usecols)))
    codes = [None] * len(textcols)
    lead = 0
    if repeat is not None and _lead_repeats(W, off, st, n_lines, *repeat):
        lead = repeat[1]
    per = repeat[0] if lead else n_lines
    reps = n_lines // per
    groups = [(c for c in usecols if c < lead), (c for c in usecols if c >= lead)]
    for g, cols in enumerate(groups):
        cols = list(cols)
        if not cols:
            continue
        sub = slice(0, per) if g == 0 and lead else slice(None)
        vals = _decode_columns(data, A, W, off, padded, st[sub], en[sub], cols,
                               [c for c in dotted if c in cols])
        if vals is None:
            return None
        if g == 0 and lead:
            vals = np.tile(vals, (reps, 1))
        values[:, [usecols.index(c) for c in cols]] = vals
    for i, c in enumerate(textcols):
        sub = slice(0, per) if c < lead else slice(None)
        a, length = st[sub, c], en[sub, c] - st[sub, c]
        if int(length.max()) > 8:
            return None
        code = W[a + off] & _LOW[length]
        codes[i] = np.tile(code, reps) if c < lead else code
    return values, codes


def _lead_repeats(W, off, st, n_lines, per, n_lead):
    """True when the first ``n_lead`` fields of every frame's lines repeat the first frame's."""
    reps = n_lines // per
    if reps < 2 or per * reps != n_lines or n_lead < 1 or n_lead >= st.shape[1]:
        return False
    start = st[:, 0]
    length = st[:, n_lead] - start
    length -= 1  # the fields and the spaces between them
    frames = length.reshape(reps, per)
    if not (frames == frames[0]).all():
        return False
    longest = int(frames[0].max())
    if longest > 24:
        return False
    for w in range(0, longest, 8):
        x = W[start + (off + w)]
        if longest - w < 8 or int(frames[0].min()) - w < 8:
            x &= _LOW[np.clip(length - w, 0, 8)]
        x = x.reshape(reps, per)
        if not (x == x[0]).all():
            return False
    return True


def _decode_columns(data, A, W, off, padded, st, en, cols, dotted):
    """(lines, len(cols)) numbers of the fields ``cols`` (bounds ``st``, ``en``), or None."""
    n_lines = len(st)
    out = np.empty((n_lines, len(cols)))
    plain = [c for c in cols if c not in dotted]
    if plain:  # columns of integers: no point expected
        vals = _decode_numbers(data, A, W, off, None, st[:, plain].ravel(),
                               en[:, plain].ravel())
        if vals is None:
            return None
        out[:, [cols.index(c) for c in plain]] = vals.reshape(n_lines, len(plain))
    if dotted:
        ts = st[:, dotted].ravel()
        te = en[:, dotted].ravel()
        dots = np.flatnonzero(A[ts[0]:te[-1]] == 46)
        dots += ts[0]
        if len(dots) == len(ts) and (dots >= ts).all() and (dots < te).all():
            dp = dots
        else:  # some numbers without a point, or points elsewhere: find each number's own
            dp = te.copy()
            todo = np.ones(len(ts), bool)
            for k in range(6):  # the point is usually among the first characters
                at = ts + k
                hit = padded[at + off] == 46
                hit &= at < te
                hit &= todo
                dp[hit] = at[hit]
                todo &= ~hit
            todo &= te - ts > 6
            rest = np.flatnonzero(todo)
            if len(rest) and len(dots):
                k = np.searchsorted(dots, ts[rest])
                cand = dots[np.minimum(k, len(dots) - 1)]
                inside = (k < len(dots)) & (cand < te[rest])
                dp[rest[inside]] = cand[inside]
        vals = _decode_numbers(data, A, W, off, dp, ts, te)
        if vals is None:
            return None
        out[:, [cols.index(c) for c in dotted]] = vals.reshape(n_lines, len(dotted))
    return out


def text_codes(words):
    """The uint64 codes :func:`decode_fields` gives for the words ``words`` (each <= 8 bytes)."""
    out = np.zeros(len(words), dtype=np.uint64)
    for i, w in enumerate(words):
        b = w.encode("utf-8") if isinstance(w, str) else bytes(w)
        if len(b) > 8:
            raise ValueError(f"word {w!r} is longer than 8 bytes")
        out[i] = int.from_bytes(b, "little")
    return out


def field_codes(codes):
    """Words (str) back from uint64 codes of :func:`decode_fields`."""
    raw = np.ascontiguousarray(codes, dtype="<u8").view("S8")
    return raw.astype("U8")  # the bulk decoder passes only ASCII


def _not_digits(x):
    """High bit of every byte of uint64 ``x`` that is not 0..9 (no carries between bytes)."""
    t = x & _LOW7
    t += _BIG_DIGIT
    t |= x
    t &= _HIGH_BITS
    return t


def _digit_bytes_value(x, t=None):
    """Value of 8 decimal digits held as bytes 0..9 in uint64 ``x`` (first lowest), in place.

    ``t`` is an optional scratch array of the same shape (overwritten).
    """
    if t is None:
        t = x >> 8
    else:
        np.right_shift(x, 8, out=t)
    x *= 10
    x += t
    x &= _M1
    np.right_shift(x, 16, out=t)
    x *= 100
    x += t
    x &= _M2
    np.right_shift(x, 32, out=t)
    x *= 10000
    x += t
    x &= _M3
    return x


class FixedWidthLayout:
    """Numbers in fixed columns, learnt from one line; decodes many such lines at once.

    A field is right-aligned: spaces, an optional sign and the integer digits
    fill the columns before its decimal point, which stands in the same column
    on every line, followed by a fixed number of digits. Fields are separated by
    at least one space, as a whitespace-splitting reader needs.

    Parameters
    ----------
    line : bytes
        One line with its newline.
    start : int
        Column where the numbers begin (the columns before hold a word, e.g.
        the species of an extended XYZ line, checked by the caller).

    Attributes
    ----------
    ok : bool
        The line has this layout (otherwise :meth:`decode` is not to be used).
    n_fields : int
    """

    def __init__(self, line, start=0):
        self.ok = False
        L = len(line)
        self.width = L
        if not line.endswith(b"\n") or start > L or not line.isascii():
            return
        toks = []
        j = start
        while j < L:
            while j < L and line[j] == 32:
                j += 1
            if j >= L or line[j] in b"\r\n":
                break
            k = j
            while k < L and line[k] not in b" \r\n\t":
                k += 1
            toks.append((j, k))
            j = k
        if not toks or (start > 0 and toks[0][0] == start):
            return
        # expected byte (or -1: a digit, -2: space/sign/digit) of every column
        self.kind = np.full(L, -3, np.int16)
        self.fields = []
        prev = start
        for a, b in toks:
            tok = line[a:b]
            body = tok[1:] if tok[:1] in (b"-", b"+") else tok
            head, dot, tail = body.partition(b".")
            if not (dot and head.isdigit() and tail.isdigit()):
                return
            d = a + (len(tok) - len(body)) + len(head)
            first = prev + 1 if (self.fields or start > 0) else prev
            if first > prev:
                self.kind[prev] = 32
            self.kind[first:d - 1] = -2
            self.kind[d - 1] = -1
            self.kind[d] = 46
            self.kind[d + 1:b] = -1
            n_int, n_frac = d - first, b - d - 1
            if n_int > 8 or n_frac > 16:
                return
            self.fields.append((first, d, n_int, n_frac))
            prev = b
        tail = line[prev:]
        if tail.strip(b" \r\n"):
            return
        self.kind[prev:] = np.frombuffer(tail, np.uint8)
        self.kind[:start] = -3  # the caller's columns
        self.n_fields = len(self.fields)
        self.exact = np.flatnonzero(self.kind >= 0)
        self.digits = np.flatnonzero(self.kind == -1)
        self.flex = np.flatnonzero(self.kind == -2)
        self.ok = True

    def decode(self, rows):
        """Numbers of lines of this layout.

        Parameters
        ----------
        rows : (..., width) uint8 ndarray
            The lines' bytes, each ending with its newline (any leading shape;
            a strided view into the file's bytes is fine).

        Returns
        -------
        (R, n_fields) float64 ndarray (R lines in all), or None when a line
        does not follow the layout.
        """
        L = rows.shape[-1]
        if L != self.width or not self.ok:
            return None
        R = rows.size // L
        out = np.empty((R, self.n_fields))
        if R == 0:
            return out
        # blocks of lines small enough to stay in the processor's cache
        if rows.ndim == 2:
            blocks = [(a, min(R, a + _ROWS_PER_BLOCK)) for a in range(0, R, _ROWS_PER_BLOCK)]
            views = [rows[a:b] for a, b in blocks]
        else:  # (frames, lines, width): whole frames per block
            lead = rows.shape[:-2]
            frames = rows.reshape((-1,) + rows.shape[-2:]) if len(lead) > 1 else rows
            per = frames.shape[1]
            step = max(1, _ROWS_PER_BLOCK // max(per, 1))
            views = [frames[f:f + step] for f in range(0, len(frames), step)]
            blocks = [(f * per, min(len(frames), f + step) * per)
                      for f in range(0, len(frames), step)]
        size = max(b - a for a, b in blocks) * L
        flat = np.zeros(size + 32, np.uint8)
        want = (self.kind[self.exact] - 48).astype(np.uint8)
        for (a, b), view in zip(blocks, views):
            if not self._decode_block(view, b - a, flat, want, out[a:b]):
                return None
        return out

    def _decode_block(self, rows, R, flat, want, out):
        """Decode ``R`` lines ``rows`` into ``out`` (R, n_fields); False if one breaks the layout."""
        L = self.width
        # every line's bytes minus ASCII '0', in a flat buffer with room for 8-byte windows
        d = flat[16:16 + R * L].reshape(rows.shape)
        np.subtract(rows, np.uint8(48), out=d)
        flat[16 + R * L:16 + R * L + 16] = 0
        d = d.reshape(R, L)
        if not (d[:, self.exact] == want).all():
            return False
        for t, (first, dot, n_int, n_frac) in enumerate(self.fields):
            # lanes 8 - n_int .. 7 of the 8 bytes before the point hold columns first .. dot - 1
            x = np.ndarray((R,), "<u8", flat, offset=16 + dot - 8, strides=(L,)).copy()
            flex = int(_HIGH[n_int]) & ~(0xFF << 56) & 0xFFFFFFFFFFFFFFFF
            seen = int(np.bitwise_or.reduce((x ^ _SPACES) & np.uint64(flex))) if flex else 0
            keep = 0xFF << 56
            neg = None
            lanes = x.view(np.uint8).reshape(R, 8)  # byte i of each line's window (little-endian)
            for i in range(8 - n_int, 7):
                if not (seen >> (8 * i)) & 0xFF:
                    continue  # a column of spaces on every line
                keep |= 0xFF << (8 * i)
                # spaces, then an optional sign, then digits up to the point
                col = lanes[:, i].copy()
                digit = col <= 9
                minus = col == 253     # '-' - '0'
                good = digit | minus
                good |= col == 251     # '+'
                good &= lanes[:, i + 1] <= 9
                good |= col == 240     # ' '
                if not good.all():
                    return False
                if minus.any():
                    neg = minus if neg is None else neg | minus
            x &= np.uint64(keep)
            if keep != 0xFF << 56:  # spaces and signs in those columns count 0
                big = _not_digits(x) & np.uint64(keep & ~(0xFF << 56))
                big >>= 7
                big *= 255
                x &= ~big
            if _not_digits(x).any():
                return False
            mant = _digit_bytes_value(x)
            done = 0
            while done < n_frac:
                k = min(8, n_frac - done)
                y = np.ndarray((R,), "<u8", flat, offset=16 + dot + 1 + done, strides=(L,)).copy()
                if k < 8:
                    y &= _LOW[k]
                if _not_digits(y).any():
                    return False
                y = _digit_bytes_value(y)
                if k < 8:
                    y //= _POW10_INT[8 - k]
                mant *= _POW10_INT[k]
                mant += y
                done += k
            if n_int + n_frac > 15 and (mant >= _TWO53).any():
                return False
            col = out[:, t]
            col[:] = mant
            col /= _POW10[n_frac]
            if neg is not None:
                np.negative(col, out=col, where=neg)
        return True


# ----------------------------------------------------------------------------- with pyarrow
#: Whether the LAMMPS reader may hand its atom lines to pyarrow's CSV reader (C++), when
#: pyarrow is installed (a dependency of diffkit); the numpy decoder otherwise. The
#: environment variable DIFFKIT_FAST_PARSE=0 turns it off.
FAST_PARSE = os.environ.get("DIFFKIT_FAST_PARSE", "1").strip().lower() not in (
    "0", "off", "no", "false")
#: Fewest bytes of atom lines worth handing to pyarrow (below, importing it costs more than
#: it saves; tests set 0).
FAST_MIN_BYTES = 1 << 20
_ARROW = None  # (pyarrow, pyarrow.csv) once imported; False when not installed


def _arrow():
    """``(pyarrow, pyarrow.csv)``, or None when pyarrow is off or not installed."""
    global _ARROW
    if not FAST_PARSE:
        return None
    if _ARROW is None:
        try:
            import pyarrow
            import pyarrow.csv
        except ImportError:
            _ARROW = False
        else:
            _ARROW = (pyarrow, pyarrow.csv)
    return _ARROW or None


def fast_parse_available():
    """True when :func:`decode_spaced_fields` can work (pyarrow installed and not turned off)."""
    return _arrow() is not None


def decode_spaced_fields(data, n_lines, n_fields, usecols, textcols=(), lines_per_frame=None,
                         frame_ends=None, intcols=()):
    """:func:`decode_fields` for lines whose fields are separated by single spaces, with pyarrow.

    pyarrow's CSV reader (C++, several times faster than the numpy decoder)
    splits the lines at single spaces and converts every field (numbers to
    float64, correctly rounded like Python's ``float``; the text columns as
    words). It refuses a line whose number of fields differs from the first
    line's, an empty field (two spaces in a row, a space at the start of a
    line) and a field that is not a number. What it accepts is therefore split
    exactly as a whitespace-splitting reader splits it; one space at the end of
    every line (as some writers leave) is allowed.

    Parameters
    ----------
    data : bytes
        Exactly ``n_lines`` lines, each ending with ``\\n``.
    n_lines, n_fields : int
    usecols : sequence of int
        Columns to convert to float64. The other columns must hold numbers too
        (any, even NaN), except ``textcols``.
    textcols : sequence of int
        Columns returned as codes (see :func:`text_codes`): printable ASCII
        words of at most 8 bytes.
    lines_per_frame : int, optional
    frame_ends : (n_frames,) int array, optional
        Where each frame of ``lines_per_frame`` lines ends in ``data``; checked.
    intcols : sequence of int
        Columns that must hold integers (ids, types, image flags): read as
        integers, which is cheaper; returned as float64 where in ``usecols``.

    Returns
    -------
    (values, codes) or None
        As :func:`decode_fields`. None when pyarrow is missing or turned off,
        or when the text is not exactly that (the caller then tries the numpy
        decoder, which takes any whitespace, and the careful parser, which says
        what is wrong).
    """
    arrow = _arrow()
    if arrow is None or not data or data[-1:] != b"\n" or n_lines < 1:
        return None
    pa, pcsv = arrow
    newline = np.frombuffer(data, np.uint8) == 10
    if np.count_nonzero(newline) != n_lines:
        return None
    if frame_ends is not None:  # each frame holds its lines
        per = lines_per_frame
        if per * len(frame_ends) != n_lines or int(frame_ends[-1]) != len(data):
            return None
        a = 0
        for b in frame_ends.tolist():
            if not newline[b - 1] or np.count_nonzero(newline[a:b]) != per:
                return None
            a = b
    first = data.find(b"\n")
    trailing = first > 0 and data[first - 1] == 32  # one space ends every line
    names = [str(i) for i in range(n_fields + trailing)]
    text = {int(c) for c in textcols}
    words = pa.dictionary(pa.int32(), pa.string())
    ints = {int(c) for c in intcols}
    types = {names[c]: (words if c in text else pa.int64() if c in ints else pa.float64())
             for c in range(n_fields)}
    try:
        table = pcsv.read_csv(
            pa.py_buffer(data),
            read_options=pcsv.ReadOptions(column_names=names, use_threads=FAST_THREADS,
                                          block_size=1 << 22),
            parse_options=pcsv.ParseOptions(delimiter=" ", quote_char=False, double_quote=False,
                                            escape_char=False, newlines_in_values=False,
                                            ignore_empty_lines=False),
            convert_options=pcsv.ConvertOptions(column_types=types,
                                                include_columns=names[:n_fields],
                                                null_values=[], true_values=[], false_values=[],
                                                strings_can_be_null=False,
                                                quoted_strings_can_be_null=False))
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError):
        return None
    if table.num_rows != n_lines:  # e.g. a lone carriage return splits a line in two
        return None
    values = np.empty((n_lines, len(usecols)))
    for k, c in enumerate(usecols):
        column = table.column(int(c))
        if column.null_count:
            return None
        a = 0
        for chunk in column.chunks:
            values[a:a + len(chunk), k] = chunk.to_numpy(zero_copy_only=False)
            a += len(chunk)
    if not np.isfinite(values).all():
        return None
    codes = []
    for c in textcols:
        out = np.empty(n_lines, np.uint64)
        a = 0
        for chunk in table.column(int(c)).chunks:
            got = [w.encode("utf-8") for w in chunk.dictionary.to_pylist()]
            if chunk.null_count or not all(map(_printable_word, got)):
                return None
            out[a:a + len(chunk)] = text_codes(got)[chunk.indices.to_numpy(zero_copy_only=False)]
            a += len(chunk)
        codes.append(out)
    return values, codes


def _printable_word(w):
    """True for 1..8 bytes of printable ASCII other than the space."""
    return 0 < len(w) <= 8 and all(33 <= b <= 126 for b in w)


# ----------------------------------------------------------------------------- symbols
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


def lines_of(data):
    """Split bytes holding whole lines into ``str`` lines (for the careful parser)."""
    return [_decode(x) for x in data.splitlines(keepends=True)]

