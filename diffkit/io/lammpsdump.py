"""Reader for LAMMPS text dumps (``dump custom`` / ``dump atom`` layouts).

Each frame is a set of ``ITEM:`` sections — ``TIMESTEP``, ``NUMBER OF ATOMS``,
``BOX BOUNDS`` (with ``xy xz yz`` for a triclinic box), optionally ``TIME`` and
``UNITS`` — followed by ``ITEM: ATOMS <columns>`` and one line per atom, in any
column order. Positions are taken from the first present of ``xu yu zu``
(unwrapped), ``xsu ysu zsu`` (scaled unwrapped), ``x y z`` (wrapped) and
``xs ys zs`` (scaled wrapped); image flags ``ix iy iz`` go with wrapped columns.
Atoms are sorted by ``id`` in every frame. Element symbols come from an
``element`` column, else from ``type_map`` applied to the ``type`` column.

Positions are Cartesian Å in the LAMMPS frame (origin at ``xlo ylo zlo``, not
shifted). The triclinic box is rebuilt from the bounding box LAMMPS writes:
``xlo = xlo_bound - min(0, xy, xz, xy + xz)``, ``xhi = xhi_bound - max(0, xy,
xz, xy + xz)``, ``ylo = ylo_bound - min(0, yz)``, ``yhi = yhi_bound - max(0,
yz)``; the lattice vectors are a = (xhi - xlo, 0, 0), b = (xy, yhi - ylo, 0),
c = (xz, yz, zhi - zlo) (LAMMPS manual, "Triclinic (non-orthogonal) simulation
boxes").

Unit styles: ``metal`` (Å, ps) and ``real`` (Å, fs) are read; velocities are
converted to Å/ps and ``ITEM: TIME`` to ps. Other styles are refused. The style
comes from ``units=``, else from an ``ITEM: UNITS`` section, else ``metal`` is
assumed with a warning. ``steps`` holds TIMESTEP; the time per step is the
user's ``md_timestep_ps``.

Speed: the atom lines of many frames are converted at once (see
:mod:`diffkit.io._parsing`): by pyarrow's CSV reader when pyarrow is
installed (a dependency) and the fields are separated by single spaces,
else by the numpy decoder, which reads ids, types and element names that
repeat frame after frame (``dump_modify sort id``) once per chunk. Both give
the same numbers bit for bit. Whatever neither recognises is read line by
line, which names the file, frame and line of any problem.
"""

from __future__ import annotations

import math

import numpy as np

from ..errors import InputError
from ..units import parse_time_ps
from . import FrameChunk
from . import _parsing
from ._parsing import (BadLine, CutOff, chunk_frames, decode_fields, decode_spaced_fields,
                       element_symbol, fast_parse_available, field_codes, in_parallel, lines_of,
                       normalize_type_map, opened, parse_columns, split_for_threads, warn)

__all__ = ["sniff", "iter_chunks", "UNIT_STYLES"]

#: LAMMPS unit styles read: (length factor to Å, time factor to ps).
UNIT_STYLES = {"metal": (1.0, 1.0), "real": (1.0, parse_time_ps("1fs"))}
_REFUSED = ("si", "cgs", "electron", "micro", "nano", "lj")

_POSITION_SETS = (
    (("xu", "yu", "zu"), "unwrapped", False),
    (("xsu", "ysu", "zsu"), "unwrapped", True),
    (("x", "y", "z"), "wrapped", False),
    (("xs", "ys", "zs"), "wrapped", True),
)


def sniff(head: str) -> bool:
    """True when the file starts with LAMMPS ``ITEM:`` sections."""
    for line in head.splitlines():
        if line.strip():
            return line.startswith("ITEM: TIMESTEP") or line.startswith("ITEM: UNITS") or \
                line.startswith("ITEM: TIME")
    return False


def _unit_style(units, source):
    if units is None:
        return None
    style = str(units).strip().lower()
    if style in UNIT_STYLES:
        return style
    if style in _REFUSED:
        raise InputError(f"{source}: LAMMPS unit style {style!r} is not supported; diffkit reads "
                         "'metal' (Å, ps) and 'real' (Å, fs) dumps — convert the dump or rerun "
                         "with one of these")
    raise InputError(f"{source}: unknown LAMMPS unit style {units!r}; expected 'metal' or 'real'")


class _Layout:
    """Which columns of ``ITEM: ATOMS`` hold what."""

    def __init__(self, columns, source, frame, lineno, have_type_map):
        self.columns = tuple(columns)
        idx = {c: i for i, c in enumerate(self.columns)}

        def err(what):
            return InputError(f"{source}: frame {frame} (line {lineno}): {what}; "
                              f"columns are: {' '.join(self.columns) or '(none)'}")

        for names, kind, scaled in _POSITION_SETS:
            present = [c in idx for c in names]
            if all(present):
                self.pos_cols = [idx[c] for c in names]
                self.kind, self.scaled = kind, scaled
                break
            if any(present):
                raise err(f"missing column(s) {[c for c in names if c not in idx]} of "
                          f"{' '.join(names)}")
        else:
            raise err("no position columns (expected xu yu zu, xsu ysu zsu, x y z or xs ys zs)")
        self.img_cols = None
        if self.kind == "wrapped":
            present = [c in idx for c in ("ix", "iy", "iz")]
            if all(present):
                self.img_cols = [idx[c] for c in ("ix", "iy", "iz")]
            elif any(present):
                raise err("image flags ix iy iz only partly present")
        present = [c in idx for c in ("vx", "vy", "vz")]
        self.vel_cols = [idx[c] for c in ("vx", "vy", "vz")] if all(present) else None
        if any(present) and not all(present):
            raise err("velocities vx vy vz only partly present")
        self.id_col = idx.get("id")
        self.type_col = idx.get("type")
        self.element_col = idx.get("element")
        if self.element_col is None:
            if self.type_col is None:
                raise err("no element or type column to tell the species")
            if not have_type_map:
                raise err("no element column; give type_map={1: 'Li', 2: 'S', ...} mapping "
                          "LAMMPS atom types to element symbols")
        # numeric columns parsed: id, type, positions, images, velocities
        self.usecols = []

        def add(cols):
            if cols is None:
                return None
            start = len(self.usecols)
            self.usecols.extend(cols)
            return slice(start, start + len(cols))

        self.s_id = add(None if self.id_col is None else [self.id_col])
        self.s_type = add(None if self.type_col is None else [self.type_col])
        self.s_pos = add(self.pos_cols)
        self.s_img = add(self.img_cols)
        self.s_vel = add(self.vel_cols)
        self.min_fields = len(self.columns)


class _Frame:
    __slots__ = ("lineno", "atoms_lineno", "box_lineno", "step", "time", "bounds", "lines")


class _DumpReader:
    def __init__(self, src, name, frames_per_chunk, type_map, units):
        self.src = src
        self.template = None
        self.name = name
        self.frames_per_chunk = frames_per_chunk
        self.type_map = normalize_type_map(type_map, name)
        self.style = _unit_style(units, name)
        self.user_style = self.style is not None
        self.layout = None
        self.n_atoms = None
        self.ref_ids = None
        self.ref_types = None
        self.species = None
        self._fast = fast_parse_available()  # pyarrow decodes the atom lines

    def _error(self, frame, line, what):
        return InputError(f"{self.name}: frame {frame} (line {line}): {what}")

    # -- one frame's header -----------------------------------------------------------
    def _read_frame(self, frame):
        """Read one frame; None at a clean end of file; raises CutOff for a cut-off frame."""
        src = self.src
        line = src.next_nonblank()
        if not line:
            if src.cut:
                raise CutOff(src.lineno, 0)
            return None
        fr = _Frame()
        fr.lineno = src.lineno
        fr.step = fr.time = fr.bounds = None
        n = None
        while True:
            if not line:
                raise CutOff(fr.lineno, 0)
            if not line.startswith("ITEM:"):
                if frame > 1 and src.lineno == fr.lineno:
                    for i, prev in enumerate(self._last_lines):
                        if prev.startswith("ITEM:"):
                            raise self._error(frame - 1, self._last_atoms_lineno,
                                              f"{i} atom lines, but ITEM: NUMBER OF ATOMS says "
                                              f"{self.n_atoms}")
                    raise self._error(frame - 1, self._last_atoms_lineno,
                                      f"more atom lines than ITEM: NUMBER OF ATOMS says "
                                      f"({self.n_atoms}); found {line.strip()[:60]!r} where "
                                      "the next frame should start")
                raise self._error(frame, src.lineno, f"expected an 'ITEM:' line, found "
                                                     f"{line.strip()[:60]!r}")
            item = line[5:].strip()
            upper = item.upper()
            if upper.startswith("ATOMS"):
                break
            if upper == "TIMESTEP":
                fr.step = self._value(int, frame, "the TIMESTEP")
            elif upper == "TIME":
                fr.time = self._value(float, frame, "the TIME")
            elif upper == "UNITS":
                self._file_units(self._value(str, frame, "the UNITS style"), frame)
            elif upper == "NUMBER OF ATOMS":
                n = self._value(int, frame, "the number of atoms")
                if n <= 0:
                    raise self._error(frame, src.lineno, f"number of atoms is {n}")
            elif upper.startswith("BOX BOUNDS"):
                fr.box_lineno = src.lineno
                fr.bounds = self._box(item, frame)
            else:
                raise self._error(frame, src.lineno, f"unexpected section 'ITEM: {item[:40]}'")
            line = src.readline()
        fr.atoms_lineno = src.lineno
        if n is None or fr.bounds is None:
            missing = [w for w, v in (("NUMBER OF ATOMS", n), ("BOX BOUNDS", fr.bounds))
                       if v is None]
            raise self._error(frame, fr.lineno, f"frame lacks ITEM: {' and ITEM: '.join(missing)}")
        if fr.step is None:
            raise self._error(frame, fr.lineno, "frame lacks ITEM: TIMESTEP")
        columns = item.split()[1:]
        if self.layout is None:
            self._start(columns, n, frame, src.lineno)
        else:
            if tuple(columns) != self.layout.columns:
                raise self._error(frame, src.lineno,
                                  "ITEM: ATOMS columns changed from "
                                  f"'{' '.join(self.layout.columns)}' to '{' '.join(columns)}'")
            if n != self.n_atoms:
                raise self._error(frame, fr.lineno, f"{n} atoms, expected {self.n_atoms}")
        fr.lines = src.take(n)
        if len(fr.lines) < n:
            raise CutOff(fr.lineno, len(fr.lines), n, src.cut)
        self._last_atoms_lineno, self._last_lines = fr.atoms_lineno, fr.lines
        return fr

    def _value(self, conv, frame, what):
        line = self.src.readline()
        if not line:
            raise CutOff(self.src.lineno, 0)
        try:
            fields = line.split()
            if len(fields) != 1:
                raise ValueError
            value = conv(fields[0])
            if conv is float and not np.isfinite(value):
                raise ValueError
            return value
        except ValueError:
            raise self._error(frame, self.src.lineno,
                              f"expected {what}, found {line.strip()[:60]!r}") from None

    def _file_units(self, style, frame):
        style = style.lower()
        if self.user_style and style != self.style:
            raise self._error(frame, self.src.lineno,
                              f"the dump says unit style {style!r} but units={self.style!r} "
                              "was given")
        if not self.user_style:
            if self.style is not None and style != self.style:
                raise self._error(frame, self.src.lineno,
                                  f"unit style changed from {self.style!r} to {style!r}")
            self.style = _unit_style(style, self.name)

    def _box(self, item, frame):
        words = item.split()[2:]
        start = self.src.lineno
        if "abc" in words or "origin" in words:
            raise self._error(frame, start, "general triclinic boxes ('BOX BOUNDS abc origin') "
                                            "are not read; write the dump with a restricted "
                                            "triclinic box")
        triclinic = "xy" in words
        want = 3 if triclinic else 2
        bounds = []
        for i in range(3):
            line = self.src.readline()
            if not line:
                raise CutOff(start, 0)
            try:
                v = [float(x) for x in line.split()[:want]]
            except ValueError:
                v = []
            if len(v) < want or not all(map(math.isfinite, v)):
                raise self._error(frame, self.src.lineno,
                                  f"expected {want} box numbers, found {line.strip()[:60]!r}")
            bounds.extend(v if triclinic else v + [0.0])
        return bounds  # xlo_b xhi_b xy ylo_b yhi_b xz zlo zhi yz

    def _cells(self, frames, first_frame):
        """Cells (k, 3, 3) and box origins (k, 3) from the frames' LAMMPS bounds."""
        b = np.array([fr.bounds for fr in frames], dtype=float)
        xlo_b, xhi_b, xy, ylo_b, yhi_b, xz, zlo, zhi, yz = b.T
        zero = np.zeros(len(b))
        xlo = xlo_b - np.minimum.reduce([zero, xy, xz, xy + xz])
        xhi = xhi_b - np.maximum.reduce([zero, xy, xz, xy + xz])
        ylo = ylo_b - np.minimum(zero, yz)
        yhi = yhi_b - np.maximum(zero, yz)
        cells = np.zeros((len(b), 3, 3))
        cells[:, 0, 0] = xhi - xlo
        cells[:, 1, 0], cells[:, 1, 1] = xy, yhi - ylo
        cells[:, 2, 0], cells[:, 2, 1], cells[:, 2, 2] = xz, yz, zhi - zlo
        bad = np.flatnonzero(np.any(cells[:, [0, 1, 2], [0, 1, 2]] <= 0, axis=1))
        if bad.size:
            j = int(bad[0])
            raise self._error(first_frame + j + 1, frames[j].box_lineno,
                              "box has zero or negative length")
        return cells, np.stack([xlo, ylo, zlo], axis=1)

    def _start(self, columns, n, frame, lineno):
        self.layout = _Layout(columns, self.name, frame, lineno, self.type_map is not None)
        self.n_atoms = n
        if self.style is None:
            self.style = "metal"
            warn(f"{self.name}: LAMMPS unit style not given; assumed 'metal' (Å, ps). Pass "
                 "units='real' (or lammps_units in the run card) if the run used real units")
        self.length_factor, self.time_factor = UNIT_STYLES[self.style]
        self.velocity_factor = self.length_factor / self.time_factor
        if self.layout.id_col is None:
            warn(f"{self.name}: no 'id' column; atoms are taken in file order, which LAMMPS "
                 "keeps only on one processor (use dump_modify sort id)")

    # -- chunks -----------------------------------------------------------------------
    def chunks(self):
        pieces, count, n_done, first_in_chunk, k = [], 0, 0, 0, None
        bulk = True
        while True:
            if bulk and self.template is not None:
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
            if n_done == 0:
                self.src.record = []
            try:
                fr = self._read_frame(frame)
            except CutOff as cut:
                if n_done == 0:
                    raise InputError(f"{self.name}: frame 1 (line {cut.lineno}) is cut off "
                                     f"({cut.how()}); no complete frame") from None
                warn(f"{self.name}: frame {frame} (line {cut.lineno}) is cut off ({cut.how()}); "
                     f"dropped it and kept the {n_done} complete frames before it")
                break
            finally:
                if n_done == 0:
                    self._learn_template(self.src.record)
                    self.src.record = None
            if fr is None:
                break
            pieces.append(fr)
            n_done += 1
            count += 1
            if k is None:
                k = chunk_frames(self.frames_per_chunk, self.n_atoms)
            if count == k:
                yield self._build(pieces, first_in_chunk)
                first_in_chunk += count
                pieces, count = [], 0
                bulk = True
        if pieces:
            yield self._build(pieces, first_in_chunk)
        elif n_done == 0:
            raise InputError(f"{self.name}: line 1: file is empty, expected a LAMMPS dump frame")

    # -- the bulk path: many frames at once -----------------------------------------------
    def _learn_template(self, record):
        """The first frame's header lines, each with what it holds (for the bulk path)."""
        self.template = None
        if not record or self.layout is None:
            return
        lines = [r for r in record if r.strip()]
        n_head = len(lines) - self.n_atoms
        if n_head < 1 or not lines[n_head - 1].startswith(b"ITEM: ATOMS"):
            return
        roles, follow = [], []
        for raw in lines[:n_head]:
            if follow:
                roles.append((follow.pop(0), raw))
                continue
            if not raw.startswith(b"ITEM:"):
                return
            item = raw[5:].strip().upper()
            roles.append(("item", raw))
            if item == b"TIMESTEP":
                follow = ["step"]
            elif item == b"TIME":
                follow = ["time"]
            elif item == b"UNITS" or item == b"NUMBER OF ATOMS":
                follow = ["same"]
            elif item.startswith(b"BOX BOUNDS"):
                follow = ["box", "box", "box"]
                self._triclinic = b"XY" in item.split()
        if follow:
            return
        self.template = roles
        self._box_at = 1 + next(i for i, (r, _) in enumerate(roles) if r == "box") - 1
        self._marker = b"\n" + lines[0]
        # when only the step line changes, the rest of the header repeats byte for byte
        self._head_ref = None
        kinds = [r for r, _ in roles]
        if kinds.count("step") == 1 and "time" not in kinds:
            i = kinds.index("step")
            self._head_ref = (b"".join(x for _, x in roles[:i]),
                              b"".join(x for _, x in roles[i + 1:]))
        self._box_raw = self._bounds = None

    def _bulk(self, want, pieces, n_done):
        """Read up to ``want`` frames in bulk.

        Returns ``(status, m)``: ``m`` frames appended to ``pieces`` as one
        decoded piece; status "more" (go on in bulk), "end" (the file ended
        cleanly after them) or "stuck" (the next frame needs the careful path;
        nothing of it was read).
        """
        src, n = self.src, self.n_atoms
        n_head = len(self.template)
        est = getattr(self, "_frame_bytes", 64 * (n + n_head))
        src.fill(int(est * want * 1.05) + 4096)
        while True:
            buf, p0 = src.buf, src.pos
            lineno = src.lineno
            frames, bodies = [], []
            p = p0
            status = "more"  # also when the buffer ends before the next whole frame
            marker, ref, bounds = self._marker, self._head_ref, self._bounds
            while len(bodies) < want:
                if p >= len(buf) and src.eof:
                    status = "end"
                    break
                fr = _Frame()
                fr.lineno = lineno + 1
                fr.time = None
                q = -2
                # the usual frame: the header of the last one with another step number
                if ref is not None and bounds is not None and buf.startswith(ref[0], p):
                    s0 = p + len(ref[0])
                    s1 = buf.find(b"\n", s0)
                    if s1 >= 0 and buf.startswith(ref[1], s1 + 1):
                        try:
                            fr.step = int(buf[s0:s1])
                        except ValueError:
                            pass
                        else:
                            fr.bounds = bounds
                            q = s1 + 1 + len(ref[1])
                if q == -2:
                    q = self._bulk_header(buf, p, fr)
                    ref, bounds = self._head_ref, self._bounds
                if q is None or q < 0:
                    status = "stuck" if q is None or src.eof else "more"
                    break
                e = buf.find(marker, q - 1)
                if e >= 0:
                    e += 1
                elif src.eof:
                    e = len(buf)
                else:
                    break
                if buf[e - 1:e] != b"\n":  # the decoder checks each frame's lines
                    status = "stuck"
                    break
                fr.atoms_lineno = lineno + n_head
                fr.box_lineno = lineno + self._box_at
                fr.lines = None
                frames.append(fr)
                bodies.append((q, e))
                lineno += n_head + n
                p = e
            if bodies or status != "more" or src.eof:
                break
            src.fill(2 * (len(buf) - p0) + 4096)  # not one whole frame in view: read more
        if not bodies:
            return ("end", 0) if status == "end" else ("stuck", 0)
        m = len(bodies)
        got = self._decode_bodies(buf, bodies)
        if got is None:
            return "stuck", 0
        data, elements = got
        self._frame_bytes = max(64, (p - p0) / m)
        pieces.append(("values", frames, data.reshape(m, n, -1), elements))
        last = buf[bodies[-1][0]:bodies[-1][1]]
        self._last_atoms_lineno, self._last_lines = frames[-1].atoms_lineno, lines_of(last)
        src.consume(p - p0, lineno - src.lineno)
        return status, m

    def _bulk_header(self, buf, p, fr):
        """Read one frame's header at ``buf[p:]`` into ``fr`` without raising.

        Returns the position after it, -1 when the buffer ends first, or None
        when only the careful path may judge it.
        """
        ref = self._head_ref
        if ref is not None and self._bounds is not None and buf.startswith(ref[0], p):
            s0 = p + len(ref[0])
            s1 = buf.find(b"\n", s0)
            if s1 < 0:
                return -1
            if buf.startswith(ref[1], s1 + 1):
                try:
                    fr.step = int(buf[s0:s1])
                except ValueError:
                    return None
                fr.bounds = self._bounds
                return s1 + 1 + len(ref[1])
        q = p
        box = []
        fr.step = None
        for role, raw in self.template:
            r = buf.find(b"\n", q)
            if r < 0:
                return -1
            line = buf[q:r + 1]
            q = r + 1
            if role == "item" or role == "same":
                if line != raw:
                    return None
            elif role == "step":
                try:
                    fr.step = int(line)
                except ValueError:
                    return None
            elif role == "time":
                try:
                    fr.time = float(line)
                except ValueError:
                    return None
                if not math.isfinite(fr.time) or len(line.split()) != 1:
                    return None
            else:
                box.append(line)
        if box != self._box_raw:
            want = 3 if self._triclinic else 2
            bounds = []
            for line in box:
                try:
                    v = [float(x) for x in line.split()[:want]]
                except ValueError:
                    return None
                if len(v) < want or not all(map(math.isfinite, v)):
                    return None
                bounds.extend(v if self._triclinic else v + [0.0])
            self._box_raw, self._bounds = box, bounds
            if self._head_ref is not None:  # the repeated header holds the box too
                i = [r for r, _ in self.template].index("step")
                lines = iter(box)
                self._head_ref = (self._head_ref[0], b"".join(
                    next(lines) if r == "box" else x for r, x in self.template[i + 1:]))
        fr.bounds = self._bounds
        return q

    def _decode_bodies(self, buf, bodies):
        """((m * n, ncols) numbers, element codes or None) of the frames' atom lines, or None."""
        lay, n, m = self.layout, self.n_atoms, len(bodies)
        view = memoryview(buf)
        text = [lay.element_col] if lay.element_col is not None else []
        dotted = sorted(lay.pos_cols + (lay.vel_cols or []))
        lead = min(lay.pos_cols)  # ids, types, names before the positions: often repeated
        ints = [c for c in (lay.id_col, lay.type_col) if c is not None] + list(lay.img_cols or [])

        def decode(a, b):
            data = b"".join(view[x:y] for x, y in bodies[a:b])
            ends = np.cumsum([y - x for x, y in bodies[a:b]])
            if self._fast and len(data) >= _parsing.FAST_MIN_BYTES:
                got = decode_spaced_fields(data, (b - a) * n, len(lay.columns), lay.usecols,
                                           textcols=text, lines_per_frame=n, frame_ends=ends,
                                           intcols=ints)
                if got is not None:
                    return got
                got = decode_fields(data, (b - a) * n, len(lay.columns), lay.usecols,
                                    textcols=text, dotted=dotted, repeat=(n, lead),
                                    frame_ends=ends)
                if got is not None:  # a layout pyarrow refuses (e.g. aligned columns)
                    self._fast = False
                return got
            return decode_fields(data, (b - a) * n, len(lay.columns), lay.usecols,
                                 textcols=text, dotted=dotted, repeat=(n, lead),
                                 frame_ends=ends)

        parts = in_parallel(decode, split_for_threads(m, bodies[-1][1] - bodies[0][0]))
        if any(got is None for got in parts):
            return None
        values = np.concatenate([got[0] for got in parts])
        codes = np.concatenate([got[1][0] for got in parts]).reshape(m, n) if text else None
        return values, codes

    def _build(self, pieces, first_frame):
        lay, n = self.layout, self.n_atoms
        frames, parts, codes = [], [], []
        careful = []  # runs of frames read line by line: (index of first, frames)
        for piece in pieces:
            if isinstance(piece, tuple):
                _, frs, data, el = piece
                frames.extend(frs)
                parts.append(data)
                codes.append(el)
                continue
            if careful and careful[-1][0] + len(careful[-1][1]) == len(frames):
                careful[-1][1].append(piece)
            else:
                careful.append((len(frames), [piece]))
                parts.append(careful[-1])
                codes.append(careful[-1])
            frames.append(piece)
        want_elements = lay.element_col is not None and (self.species is None
                                                         or lay.type_col is None)
        datas, elements = [], []
        for part, el in zip(parts, codes):
            if isinstance(part, np.ndarray):
                datas.append(part)
                if want_elements:
                    elements.append(field_codes(el))
                continue
            j0, run = part
            all_lines = [line for fr in run for line in fr.lines]
            try:
                data = parse_columns(all_lines, lay.usecols, lay.min_fields)
            except BadLine as bad:
                j, i = divmod(bad.index, n)
                j += j0
                if all_lines[bad.index].startswith("ITEM:"):
                    raise self._error(first_frame + j + 1, frames[j].atoms_lineno,
                                      f"{i} atom lines, but ITEM: NUMBER OF ATOMS says {n}") \
                        from None
                raise self._error(first_frame + j + 1, frames[j].atoms_lineno + 1 + i,
                                  bad.reason) from None
            datas.append(data.reshape(len(run), n, -1))
            if want_elements:
                elements.append(np.loadtxt(all_lines, dtype=str, usecols=[lay.element_col],
                                           comments=None, ndmin=1).reshape(len(run), n))
        data = datas[0] if len(datas) == 1 else np.concatenate(datas)
        if want_elements:
            elements = elements[0] if len(elements) == 1 else np.concatenate(elements)
        else:
            elements = None
        if lay.s_id is not None:
            ids = data[:, :, lay.s_id.start]
            if np.any(ids != np.round(ids)):
                j = int(np.flatnonzero(np.any(ids != np.round(ids), axis=1))[0])
                raise self._error(first_frame + j + 1, frames[j].atoms_lineno,
                                  "atom ids are not integers")
            ids = ids.astype(np.int64)
            if (ids[:, 1:] > ids[:, :-1]).all():  # already in id order (dump_modify sort id)
                sorted_ids = ids
            else:
                order = np.argsort(ids, axis=1, kind="stable")
                data = np.take_along_axis(data, order[:, :, None], axis=1)
                if elements is not None:
                    elements = np.take_along_axis(elements, order, axis=1)
                sorted_ids = np.take_along_axis(ids, order, axis=1)
            if self.ref_ids is None:
                self.ref_ids = sorted_ids[0].copy()
                dup = np.flatnonzero(np.diff(self.ref_ids) == 0)
                if dup.size:
                    raise self._error(first_frame + 1, frames[0].atoms_lineno,
                                      f"atom id {self.ref_ids[dup[0]]} appears twice")
            bad = np.flatnonzero(np.any(sorted_ids != self.ref_ids, axis=1))
            if bad.size:
                j = int(bad[0])
                extra = np.setdiff1d(sorted_ids[j], self.ref_ids)
                what = (f"atom id {extra[0]} not in the first frame" if extra.size
                        else "an atom id appears twice")
                raise self._error(first_frame + j + 1, frames[j].atoms_lineno, what)
        self._species(data, elements, frames, first_frame)
        cells, origins = self._cells(frames, first_frame)
        cells, origins = cells * self.length_factor, origins * self.length_factor
        pos = data[:, :, lay.s_pos]
        if lay.scaled:
            pos = origins[:, None, :] + np.matmul(pos, cells)
        elif self.length_factor != 1.0:
            pos = pos * self.length_factor
        images = None
        if lay.s_img is not None:
            images = data[:, :, lay.s_img].astype(np.int64)
        velocities = None
        if lay.s_vel is not None:
            velocities = data[:, :, lay.s_vel] * self.velocity_factor
        steps = np.array([fr.step for fr in frames], dtype=np.int64)
        times = None
        if all(fr.time is not None for fr in frames):
            times = np.array([fr.time for fr in frames]) * self.time_factor
        return FrameChunk(species=self.species, cells=cells, positions=np.ascontiguousarray(pos),
                          kind=lay.kind, images=images, steps=steps, times_ps=times,
                          velocities=velocities, first_frame=first_frame, source=self.name,
                          meta={"units": self.style})

    def _species(self, data, elements, frames, first_frame):
        lay = self.layout
        types = None
        if lay.s_type is not None:
            types = data[:, :, lay.s_type.start]
            if self.ref_types is None:
                self.ref_types = types[0].copy()
            bad = np.flatnonzero(np.any(types != self.ref_types, axis=1))
            if bad.size:
                j = int(bad[0])
                a = int(np.flatnonzero(types[j] != self.ref_types)[0])
                raise self._error(first_frame + j + 1, frames[j].atoms_lineno,
                                  f"atom {a + 1} (in id order) changed type from "
                                  f"{self.ref_types[a]:g} to {types[j, a]:g}")
        if elements is not None:
            if self.species is None:
                syms = []
                for e in map(str, elements[0]):
                    s = element_symbol(e)
                    if s is None or s != e:
                        raise self._error(first_frame + 1, frames[0].atoms_lineno,
                                          f"unknown element {e!r} in the element column")
                    syms.append(s)
                self.species = tuple(syms)
            ref = np.array(self.species)
            bad = np.flatnonzero(np.any(elements != ref, axis=1))
            if bad.size:
                j = int(bad[0])
                a = int(np.flatnonzero(elements[j] != ref)[0])
                raise self._error(first_frame + j + 1, frames[j].atoms_lineno,
                                  f"atom {a + 1} (in id order) changed element from "
                                  f"{str(ref[a])!r} to {str(elements[j, a])!r}")
        elif self.species is None:
            syms = []
            for t in self.ref_types:
                key = int(t)
                if key != t or key not in self.type_map:
                    raise self._error(first_frame + 1, frames[0].atoms_lineno,
                                      f"atom type {t:g} is not in type_map "
                                      f"{dict(sorted(self.type_map.items()))}")
                syms.append(self.type_map[key])
            self.species = tuple(syms)


def iter_chunks(path, *, frames_per_chunk=1000, type_map=None, units=None):
    """Read a LAMMPS text dump in chunks of frames.

    Parameters
    ----------
    path : str, path-like or open file
        Plain, gzip, bz2 or xz (told by content).
    frames_per_chunk : int
        Frames per chunk (fewer for very large systems, to bound memory).
    type_map : dict of int -> str, optional
        LAMMPS atom type -> element symbol; needed when there is no ``element`` column.
    units : {"metal", "real"}, optional
        LAMMPS unit style; default from ``ITEM: UNITS``, else ``metal`` with a warning.

    Yields
    ------
    FrameChunk
        ``positions`` (k, n_atoms, 3) Cartesian Å sorted by id; ``kind`` "unwrapped"
        or "wrapped" (with ``images`` where the dump has ix iy iz); ``steps``
        from TIMESTEP; ``velocities`` Å/ps where vx vy vz are present;
        ``meta["units"]`` the unit style used.

    Raises
    ------
    InputError
        Empty file, no complete frame, atom count or columns changing, missing
        columns, text or NaN in numeric columns, unknown element or type, an
        unsupported unit style. A cut-off last frame is dropped with a warning.
    """
    with opened(path) as (src, name):
        yield from _DumpReader(src, name, frames_per_chunk, type_map, units).chunks()
