"""Reader for extended XYZ trajectories.

Each frame: a line with the atom count, a comment line of ``key=value`` pairs,
then one line per atom. Keys read from the comment line (case-insensitive):

``Lattice="ax ay az bx by bz cx cy cz"``
    Cell, rows are lattice vectors, Å. Required: diffusion needs the periodic
    cell (periodic boundaries are assumed in all three directions).
``Properties=name:type:ncols:...``
    Column layout; default ``species:S:1:pos:R:3``. Positions from ``pos``
    (or ``positions``), species from ``species`` (or ``symbols``); velocities
    from ``vel``/``velo``/``velocities`` (unit from ``velocity_unit=``, one of
    ``A/ps``, ``A/fs``; Å/fs assumed with a warning when absent) or from ASE's
    ``momenta`` (ASE units, divided by the element masses of ``ase.data``).
``time_ps=``, ``time_fs=``, ``time=``
    Frame time. A bare ``time=`` is taken as fs — the unit most MD codes print —
    unless ``time_unit=`` (as, fs, ps, ns) says otherwise; a warning says when fs
    was assumed.
``step=`` or ``timestep=``
    MD step number.
``unwrapped=T``
    Positions are unwrapped (``kind="unwrapped"``); otherwise ``kind="wrapped"``.

The LAMMPS-only ``units`` argument is ignored. ``type_map`` maps a species
column of integer types (``1``, ``2``, ...) to element symbols.

Speed: the atom lines of many frames are converted at once (fixed-width
columns as ASE and diffkit write them, else whitespace-separated fields; see
:mod:`diffkit.io._parsing`), and a comment line that repeats the previous
one's keys is read through a pattern built from it. Whatever that bulk path
does not recognise is read line by line, which names the file, frame and line
of any problem.
"""

from __future__ import annotations

import math
import re

import numpy as np

from ..errors import InputError, UnitsError
from ..units import parse_time_ps
from . import FrameChunk
from ._parsing import (_LOW, BadLine, CutOff, FixedWidthLayout, chunk_frames, decode_fields,
                       element_symbol, lines_of, normalize_type_map, opened, parse_columns,
                       text_codes, warn)

__all__ = ["sniff", "iter_chunks"]

_PAIR = re.compile(r'([A-Za-z_][\w\-]*)\s*=\s*("(?:[^"\\]|\\.)*"|\{[^}]*\}|\S+)|(\S+)')
_TRUE = ("t", "true", "1", "yes")
_VELOCITY_NAMES = ("vel", "velo", "velocities", "velocity")
_VELOCITY_UNITS = {"a/ps": 1.0, "å/ps": 1.0, "ang/ps": 1.0,
                   "a/fs": 1.0 / parse_time_ps("1fs"), "å/fs": 1.0 / parse_time_ps("1fs"),
                   "ang/fs": 1.0 / parse_time_ps("1fs")}


def sniff(head: str) -> bool:
    """True when the file starts with an atom count and a comment line holding ``Lattice=``."""
    lines = head.splitlines()
    if len(lines) < 2:
        return False
    try:
        int(lines[0].strip())
    except ValueError:
        return False
    return "lattice=" in lines[1].lower()


def parse_comment(line):
    """The ``key=value`` pairs of an extended XYZ comment line, keys lower-cased.

    A bare word (no ``=``) becomes ``True``; quotes and braces are removed.
    """
    out = {}
    for m in _PAIR.finditer(line):
        if m.group(1) is None:
            out[m.group(3).lower()] = True
            continue
        value = m.group(2)
        if value[:1] in ('"', "{"):
            value = value[1:-1]
        out[m.group(1).lower()] = value
    return out


def _properties(text, error):
    """[(name, type, ncols, first column)] from a Properties= value."""
    parts = text.split(":")
    if len(parts) % 3:
        raise error(f"cannot read Properties={text!r} (expected name:type:count triples)")
    cols, start = [], 0
    for i in range(0, len(parts), 3):
        name, typ = parts[i], parts[i + 1].upper()
        try:
            count = int(parts[i + 2])
        except ValueError:
            raise error(f"cannot read Properties={text!r}: count {parts[i + 2]!r}") from None
        if typ not in ("S", "R", "I", "L") or count < 1:
            raise error(f"cannot read Properties={text!r}: {name}:{typ}:{count}")
        cols.append((name.lower(), typ, count, start))
        start += count
    return cols, start


class _Layout:
    def __init__(self, props_text, error):
        cols, self.n_fields = _properties(props_text, error)
        by = {c[0]: c for c in cols}

        def pick(names, typ, count):
            for nm in names:
                if nm in by:
                    _, t, c, start = by[nm]
                    if t not in typ or c != count:
                        raise error(f"Properties column {nm!r} is {t}:{c}, expected "
                                    f"{'/'.join(typ)}:{count}")
                    return nm, start
            return None, None

        _, self.species_col = pick(("species", "symbols", "element"), ("S", "I"), 1)
        if self.species_col is None:
            raise error(f"no species column in Properties={props_text!r}")
        _, self.pos_col = pick(("pos", "positions"), ("R",), 3)
        if self.pos_col is None:
            raise error(f"no pos:R:3 column in Properties={props_text!r}")
        self.vel_name, self.vel_col = pick(_VELOCITY_NAMES + ("momenta",), ("R",), 3)
        self.usecols = list(range(self.pos_col, self.pos_col + 3))
        if self.vel_col is not None:
            self.usecols += list(range(self.vel_col, self.vel_col + 3))
        self.text = props_text


_VARYING = ("lattice", "time_ps", "time_fs", "time", "step", "timestep")
_NON_SPACE = re.compile(r"\S+")


class _CommentTemplate:
    """A comment line with the values that change from frame to frame cut out.

    A later comment that repeats everything else character for character holds
    the same keys in the same order, so only those values need reading (one
    regular expression built from the first line finds them).
    """

    def __init__(self, comment, info):
        self.info = info
        self.keys = []
        pattern = []
        pos = 0
        for m in _PAIR.finditer(comment):
            if m.group(1) is None or m.group(1).lower() not in _VARYING:
                continue
            a, b = m.span(2)
            pattern.append(re.escape(comment[pos:a]))
            quoted = comment[a] == '"'
            pattern.append(r'"([^"\\]*)"' if quoted else r'([^\s"{]\S*)')
            self.keys.append(m.group(1).lower())
            pos = b
        pattern.append(re.escape(comment[pos:]))
        self.pattern = re.compile("".join(pattern), re.DOTALL)
        self.head = None  # the same, with the count line before it, over bytes (set by the reader)
        self.lattice_text = info.get("lattice")
        self.cell = None
        if self.lattice_text is not None:
            try:
                v = [float(x) for x in str(self.lattice_text).replace(",", " ").split()]
                if len(v) == 9 and all(map(math.isfinite, v)):
                    self.cell = v
            except ValueError:
                pass
        if self.cell is None:
            self.lattice_text = None
        self.lattice_bytes = None if self.lattice_text is None else \
            str(self.lattice_text).encode("utf-8")

    def match(self, comment):
        """The changing values of ``comment`` ({key: text}), or None if it differs otherwise."""
        m = self.pattern.fullmatch(comment)
        if m is None:
            return None
        return dict(zip(self.keys, m.groups()))

    def compile_head(self, count_line):
        """A bytes pattern for the count line and this comment line together."""
        text = self.pattern.pattern
        try:
            self.head = re.compile(re.escape(count_line) + text.encode("utf-8"), re.DOTALL)
        except (UnicodeEncodeError, re.error):  # pragma: no cover - odd comment text
            self.head = None


class _XyzReader:
    def __init__(self, src, name, frames_per_chunk, type_map):
        self.src = src
        self._ref = None
        self._template = None
        self.name = name
        self.frames_per_chunk = frames_per_chunk
        self.type_map = normalize_type_map(type_map, name)
        self.layout = None
        self.n = None
        self.species = None
        self.kind = None
        self.time_mode = None
        self.vel_factor = None
        self.warned = set()

    def _error(self, frame, line, what):
        return InputError(f"{self.name}: frame {frame} (line {line}): {what}")

    def _warn_once(self, key, message):
        if key not in self.warned:
            self.warned.add(key)
            warn(message)

    def _read_frame(self, frame):
        src = self.src
        line = src.next_nonblank()
        if not line:
            if src.cut:
                raise CutOff(src.lineno, 0)
            return None
        start = src.lineno
        try:
            n = int(line.strip())
        except ValueError:
            if self.n is not None and frame > 1:
                for i, prev in enumerate(self._last_lines):
                    if prev.strip().isdigit():
                        raise self._error(frame - 1, self._last_start,
                                          f"{i} atom lines, but its count line says {self.n}") \
                            from None
                raise self._error(frame - 1, self._last_start,
                                  f"more atom lines than its count line says ({self.n}); found "
                                  f"{line.strip()[:60]!r} where the next frame should start") \
                    from None
            raise self._error(frame, start, f"expected the number of atoms, found "
                                            f"{line.strip()[:60]!r}") from None
        if n <= 0:
            raise self._error(frame, start, f"number of atoms is {n}")
        if self.n is not None and n != self.n:
            raise self._error(frame, start, f"{n} atoms, expected {self.n}")
        comment = src.readline()
        if not comment:
            raise CutOff(start, 0)
        info = parse_comment(comment)

        def err(what):
            return self._error(frame, start + 1, what)

        props = info.get("properties", "species:S:1:pos:R:3")
        if self.layout is None:
            self.layout = _Layout(props, err)
            self.n = n
            self._velocity_unit(info, err)
        elif props != self.layout.text:
            raise err(f"Properties changed from {self.layout.text!r} to {props!r}")
        cell, time, step = self._facts(info, err)
        lines = src.take(n)
        if len(lines) < n:
            raise CutOff(start, len(lines), n, src.cut)
        self._last_start, self._last_lines = start, lines
        return start, cell, time, step, lines

    def _facts(self, info, err):
        """Cell, time and step of one comment line (checks the kind of positions too)."""
        cell = self._lattice(info, err)
        time = self._time(info, err)
        step = None
        for key in ("step", "timestep"):
            if key in info:
                try:
                    step = int(info[key])
                except (TypeError, ValueError):
                    raise err(f"{key}={info[key]!r} is not an integer") from None
                break
        kind = "unwrapped" if str(info.get("unwrapped", "F")).lower() in _TRUE else "wrapped"
        if self.kind is None:
            self.kind = kind
        elif kind != self.kind:
            raise err(f"frame says unwrapped={kind == 'unwrapped'} unlike the first frame")
        return cell, time, step

    def _velocity_unit(self, info, err):
        lay = self.layout
        if lay.vel_col is None:
            return
        if lay.vel_name == "momenta":
            self.vel_factor = "momenta"
            return
        unit = info.get("velocity_unit")
        if unit is None:
            self.vel_factor = _VELOCITY_UNITS["a/fs"]
            self._warn_once("vel", f"{self.name}: no velocity_unit= on the comment line; "
                                   f"velocities in column {lay.vel_name!r} taken as Å/fs")
            return
        key = str(unit).lower().replace(" ", "")
        if key not in _VELOCITY_UNITS:
            raise err(f"velocity_unit={unit!r} is not one of A/ps, A/fs")
        self.vel_factor = _VELOCITY_UNITS[key]

    def _lattice(self, info, err):
        if "lattice" not in info:
            raise err("no Lattice= on the comment line; diffusion in a periodic cell needs "
                      "the cell")
        try:
            v = [float(x) for x in str(info["lattice"]).replace(",", " ").split()]
        except ValueError:
            v = []
        if len(v) != 9 or not all(map(math.isfinite, v)):
            raise err(f"Lattice={info['lattice']!r} is not nine numbers")
        return v

    def _time(self, info, err):
        for key, unit in (("time_ps", "ps"), ("time_fs", "fs"), ("time", None)):
            if key not in info:
                continue
            if unit is None:
                unit = info.get("time_unit")
                if unit is None:
                    unit = "fs"
                    self._warn_once("time", f"{self.name}: 'time=' without time_unit=; taken as "
                                            "fs (write time_ps= or time_unit= to be explicit)")
            try:
                return parse_time_ps(f"{float(info[key])!r}{unit}", what=f"{key}=")
            except UnitsError as exc:
                raise err(str(exc)) from None
            except (TypeError, ValueError):
                raise err(f"{key}={info[key]!r} is not a number") from None
        return None

    def chunks(self):
        pieces, count, n_done, first_in_chunk, k = [], 0, 0, 0, None
        bulk = True
        while True:
            if bulk and self.layout is not None:
                status, m = self._bulk(k - count, pieces, n_done)
                n_done += m
                count += m
                if count == k:
                    yield self._build(pieces, first_in_chunk)
                    first_in_chunk += count
                    pieces, count = [], 0
                if status == "end":
                    break
                if status == "more":
                    continue
                bulk = False  # line by line until this chunk is full
            frame = n_done + 1
            try:
                fr = self._read_frame(frame)
            except CutOff as cut:
                if n_done == 0:
                    raise InputError(f"{self.name}: frame 1 (line {cut.lineno}) is cut off "
                                     f"({cut.how()}); no complete frame") from None
                warn(f"{self.name}: frame {frame} (line {cut.lineno}) is cut off ({cut.how()}); "
                     f"dropped it and kept the {n_done} complete frames before it")
                break
            if fr is None:
                break
            pieces.append(("lines",) + fr)
            if n_done == 0:
                self._first_lines = fr[4]
            n_done += 1
            count += 1
            if k is None:
                k = chunk_frames(self.frames_per_chunk, self.n)
            if count == k:
                yield self._build(pieces, first_in_chunk)
                first_in_chunk += count
                pieces, count = [], 0
                bulk = True
        if pieces:
            yield self._build(pieces, first_in_chunk)
        elif n_done == 0:
            raise InputError(f"{self.name}: line 1: file is empty, expected extended XYZ frames")

    # -- the bulk path: many frames at once -----------------------------------------------
    def _bulk(self, want, pieces, n_done):
        """Read up to ``want`` frames in bulk.

        Returns ``(status, m)``: ``m`` frames appended to ``pieces`` as one
        decoded piece; status "more" (go on in bulk), "end" (the file ended
        cleanly after them) or "stuck" (the next frame needs the careful path;
        nothing of it was read).
        """
        src, n = self.src, self.n
        if self._ref is None and not self._learn_reference():
            return "stuck", 0
        est = getattr(self, "_frame_bytes", 80 * (n + 2))
        src.fill(int(est * want * 1.05) + 4096)
        count_line = self._count_bytes
        marker = b"\n" + count_line
        fixed = getattr(self, "_fixed", None)
        width = fixed.width if fixed is not None and fixed.ok else 0
        while True:
            buf, p0 = src.buf, src.pos
            lineno = src.lineno
            starts, cells, times, steps, bodies = [], [], [], [], []
            p = p0
            status = "more"  # also when the buffer ends before the next whole frame
            while len(bodies) < want:
                if p >= len(buf) and src.eof:
                    status = "end"
                    break
                tpl = self._template
                if width and tpl is not None and tpl.head is not None:
                    # fixed-width lines and a comment like the last one: one match per frame
                    head = tpl.head.match(buf, p)
                    e = head.end() + n * width if head is not None else -1
                    if 0 < e <= len(buf) and buf[e - 1] == 10 and (
                            buf.startswith(count_line, e) or (e == len(buf) and src.eof)):
                        facts = self._head_facts(tpl, head.groups(), n_done + len(bodies) + 1,
                                                 lineno + 2)
                        if facts is not None:
                            starts.append(lineno + 1)
                            cells.append(facts[0])
                            times.append(facts[1])
                            steps.append(facts[2])
                            bodies.append((head.end(), e))
                            lineno += n + 2
                            p = e
                            continue
                c0 = p + len(count_line)
                c1 = buf.find(b"\n", c0 - 1)
                if c1 < 0:
                    status = "more" if not src.eof else "stuck"
                    break
                if c1 != c0 - 1 or not buf.startswith(count_line, p):
                    status = "stuck"
                    break
                c1 = buf.find(b"\n", c0)
                e = c1 + 1 + n * width if c1 >= 0 and width else -1
                if 0 < e <= len(buf) and buf[e - 1] == 10 and (
                        buf.startswith(count_line, e) or (e == len(buf) and src.eof)):
                    pass  # fixed-width lines: the decoder checks every line's length and newline
                else:
                    q = buf.find(marker, c1) if c1 >= 0 else -1
                    if q >= 0:
                        e = q + 1
                    elif c1 >= 0 and src.eof:
                        e = len(buf)
                    else:
                        status = "more" if not src.eof else "stuck"
                        break
                    if buf.count(b"\n", c1 + 1, e) != n or buf[e - 1:e] != b"\n":
                        status = "stuck"
                        break
                facts = self._bulk_comment(buf[c0:c1 + 1], n_done + len(bodies) + 1, lineno + 2)
                if facts is None:
                    status = "stuck"
                    break
                starts.append(lineno + 1)
                cells.append(facts[0])
                times.append(facts[1])
                steps.append(facts[2])
                bodies.append((c1 + 1, e))
                lineno += n + 2
                p = e
            if bodies or status != "more" or src.eof:
                break
            src.fill(2 * (len(buf) - p0) + 4096)  # not one whole frame in view: read more
        if not bodies:
            return ("end", 0) if status == "end" else ("stuck", 0)
        m = len(bodies)
        data = self._decode_bodies(buf, bodies)
        if data is None:
            return "stuck", 0
        self._frame_bytes = max(64, (p - p0) / m)
        pieces.append(("values", starts, cells, times, steps, data.reshape(m, n, -1)))
        last = buf[bodies[-1][0]:bodies[-1][1]]
        self._last_start, self._last_lines = starts[-1], lines_of(last)
        src.consume(p - p0, lineno - src.lineno)
        return status, m

    def _bulk_comment(self, raw, frame, lineno):
        """(cell, time, step) of a comment line, or None when only the careful path may judge it."""
        comment = raw.decode("utf-8", "replace")

        def err(what):
            return self._error(frame, lineno, what)

        tpl = self._template
        values = tpl.match(comment) if tpl is not None else None
        if values is None:  # read the whole line
            info = parse_comment(comment)
            if info.get("properties", "species:S:1:pos:R:3") != self.layout.text:
                return None
            self._template = _CommentTemplate(comment, info)
            self._template.compile_head(self._count_bytes)
            try:
                return self._facts(info, err)
            except InputError:
                return None
        try:
            lattice = values.get("lattice")
            if lattice is not None and lattice != tpl.lattice_text:
                tpl.cell = self._lattice({"lattice": lattice}, err)
                tpl.lattice_text, tpl.lattice_bytes = lattice, lattice.encode("utf-8")
            if "time_ps" in values:
                time = float(values["time_ps"])
                if not math.isfinite(time):
                    return None
            else:
                time = self._time({**tpl.info, **values}, err)
            step = None
            for key in ("step", "timestep"):
                if key in values:
                    step = int(values[key])
                    break
        except (InputError, ValueError):
            return None
        return tpl.cell, time, step

    def _head_facts(self, tpl, groups, frame, lineno):
        """(cell, time, step) from the changing values (bytes) a template match found, or None."""
        values = dict(zip(tpl.keys, groups))
        try:
            lattice = values.get("lattice")
            if lattice is not None and lattice != tpl.lattice_bytes:
                text = lattice.decode("utf-8")
                tpl.cell = self._lattice({"lattice": text}, lambda what: InputError(what))
                tpl.lattice_text, tpl.lattice_bytes = text, lattice
            if "time_ps" in values:
                time = float(values["time_ps"])
                if not math.isfinite(time):
                    return None
            else:
                strs = {k: v.decode("utf-8") for k, v in values.items()}
                time = self._time({**tpl.info, **strs}, lambda what: InputError(what))
            step = None
            for key in ("step", "timestep"):
                if key in values:
                    step = int(values[key])
                    break
        except (InputError, ValueError, UnicodeDecodeError):
            return None
        return tpl.cell, time, step

    def _learn_reference(self):
        """Species words of the first frame (read line by line), for checking later frames."""
        lines = self._first_lines
        col = self.layout.species_col
        words = []
        for line in lines:
            f = line.split()
            if len(f) != self.layout.n_fields:
                return False
            words.append(f[col])
        try:
            self._ref_codes = text_codes(words)
        except ValueError:
            return False
        raw = [line.encode("utf-8") for line in lines]
        self._count_bytes = (str(self.n) + "\n").encode()
        self._prefix = None
        if col == 0:
            width = max(len(r.split(None, 1)[0]) for r in raw)
            if width <= 8 and all(len(r) > max(width, 8) and r[width:width + 1] == b" "
                                  for r in raw):
                self._prefix = (width, text_codes([r[:width] for r in raw]))
                self._fixed = FixedWidthLayout(raw[0], start=width)
        self._ref = True
        return True

    def _decode_bodies(self, buf, bodies):
        """(m * n, ncols) numbers of the frames' atom lines (species checked), or None."""
        lay, n, m = self.layout, self.n, len(bodies)
        view = memoryview(buf)
        data = b"".join(view[a:b] for a, b in bodies)
        R = m * n
        fixed = getattr(self, "_fixed", None)
        if fixed is not None and fixed.ok and len(data) == R * fixed.width:
            rows = np.frombuffer(data, np.uint8).reshape(R, fixed.width)
            width, ref = self._prefix
            # the first 8 bytes of every line (lines are longer than 8 bytes), species kept
            words = np.ndarray((R,), "<u8", data, offset=0, strides=(fixed.width,)) & _LOW[width]
            if (words.reshape(m, n) == ref).all():
                values = fixed.decode(rows)
                if values is not None:
                    cols = [c - 1 for c in lay.usecols]
                    return values if cols == list(range(values.shape[1])) else values[:, cols]
            # frames were cut by length: make sure each holds n lines before reading by fields
            if any(buf.count(b"\n", a, b) != n for a, b in bodies):
                return None
        got = decode_fields(data, R, lay.n_fields, lay.usecols, textcols=[lay.species_col],
                            dotted=sorted(lay.usecols))
        if got is None:
            return None
        values, (codes,) = got
        if not (codes.reshape(m, n) == self._ref_codes).all():
            return None
        return values

    # -- turning frames into arrays -------------------------------------------------------
    def _build(self, pieces, first_frame):
        lay, n = self.layout, self.n
        frames, datas = [], []  # (start, cell, time, step) per frame; data per piece
        careful = []            # runs of frames read line by line: (index of first, frames)
        for piece in pieces:
            if piece[0] == "values":
                _, starts, cells, times, steps, data = piece
                frames.extend(zip(starts, cells, times, steps))
                datas.append(data)
            else:
                if careful and careful[-1][0] + len(careful[-1][1]) == len(frames):
                    careful[-1][1].append(piece[1:])
                else:
                    careful.append((len(frames), [piece[1:]]))
                    datas.append(careful[-1])
                frames.append(piece[1:5])
        k = len(frames)
        names = {}
        parts = []
        for d in datas:
            if isinstance(d, np.ndarray):
                parts.append(d)
                continue
            j0, run = d
            all_lines = [line for fr in run for line in fr[4]]
            try:
                data = parse_columns(all_lines, lay.usecols, lay.n_fields)
            except BadLine as bad:
                j, i = divmod(bad.index, n)
                text = all_lines[bad.index].strip()
                j += j0
                if text.isdigit():
                    raise self._error(first_frame + j + 1, frames[j][0],
                                      f"{i} atom lines, but its count line says {n}") from None
                raise self._error(first_frame + j + 1, frames[j][0] + 2 + i, bad.reason) \
                    from None
            parts.append(data.reshape(len(run), n, -1))
            names[j0] = (all_lines, len(run))
        data = np.concatenate(parts)
        cells = np.array([fr[1] for fr in frames], dtype=float).reshape(k, 3, 3)
        flat = np.flatnonzero(np.abs(np.linalg.det(cells)) < 1e-12)
        if flat.size:
            j = int(flat[0])
            raise self._error(first_frame + j + 1, frames[j][0] + 1, "Lattice= spans no volume")
        for j0, (all_lines, kk) in names.items():
            words = np.loadtxt(all_lines, dtype=str, usecols=[lay.species_col], comments=None,
                               ndmin=1).reshape(kk, n)
            if self.species is None:
                self.species = self._symbols(words[0], frames[0][0], first_frame + 1)
                self._raw_names = words[0].copy()
            bad = np.flatnonzero(np.any(words != self._raw_names, axis=1))
            if bad.size:
                j = int(bad[0]) + j0
                a = int(np.flatnonzero(words[j - j0] != self._raw_names)[0])
                raise self._error(first_frame + j + 1, frames[j][0] + 2 + a,
                                  f"atom {a + 1} is {str(words[j - j0, a])!r}, was "
                                  f"{str(self._raw_names[a])!r} in the first frame")
        positions = np.ascontiguousarray(data[:, :, 0:3])
        velocities = None
        if lay.vel_col is not None:
            velocities = data[:, :, 3:6]
            if self.vel_factor == "momenta":
                import ase.units
                from ase.data import atomic_masses, atomic_numbers

                masses = np.array([atomic_masses[atomic_numbers[s]] for s in self.species])
                # ASE momenta: amu·Å/(ASE time); 1 ps = 1000·ase.units.fs ASE time units
                velocities = velocities / masses[None, :, None] * (1000.0 * ase.units.fs)
            else:
                velocities = velocities * self.vel_factor
        times = [fr[2] for fr in frames]
        steps = [fr[3] for fr in frames]
        return FrameChunk(
            species=self.species, cells=cells, positions=positions,
            kind=self.kind, first_frame=first_frame, source=self.name, velocities=velocities,
            times_ps=None if any(t is None for t in times) else np.array(times, dtype=float),
            steps=None if any(s is None for s in steps) else np.array(steps, dtype=np.int64))

    def _symbols(self, names, lineno, frame):
        out = []
        for a, nm in enumerate(map(str, names)):
            sym = element_symbol(nm) if not nm.isdigit() else None
            if sym is None or sym != nm:
                if self.type_map is not None and nm.isdigit() and int(nm) in self.type_map:
                    sym = self.type_map[int(nm)]
                else:
                    raise self._error(frame, lineno + 2 + a, f"unknown element {nm!r}"
                                      + ("; give type_map for numbered types" if nm.isdigit()
                                         else ""))
            out.append(str(sym))
        return tuple(out)




def iter_chunks(path, *, frames_per_chunk=1000, type_map=None, units=None):
    """Read an extended XYZ file in chunks of frames.

    Parameters
    ----------
    path : str, path-like or open file
        Plain, gzip, bz2 or xz (told by content).
    frames_per_chunk : int
        Frames per chunk (fewer for very large systems, to bound memory).
    type_map : dict of int -> str, optional
        Symbols for a species column holding integer types.
    units : ignored

    Yields
    ------
    FrameChunk
        ``cells`` from Lattice=, ``positions`` Cartesian Å, ``times_ps`` and
        ``steps`` where every frame of the chunk has them, ``velocities`` Å/ps.

    Raises
    ------
    InputError
        Empty file, no complete frame, atom count or Properties changing, no
        Lattice=, text or NaN in numeric columns, unknown element. A cut-off last
        frame is dropped with a warning.
    """
    with opened(path) as (src, name):
        yield from _XyzReader(src, name, frames_per_chunk, type_map).chunks()
