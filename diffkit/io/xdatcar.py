"""Reader for VASP XDATCAR trajectories.

Layout: a header (title; scale factor; three lattice vectors; element names;
atom counts), then one block per frame: a ``Direct configuration=  N`` line and
one line of three coordinates per atom. In a variable-cell file (NpT runs) the
header is repeated before every frame. The VASP 4 layout without the element
names line is read when ``type_map`` gives the symbols ({1: "Li", 2: "P", ...},
numbered in the order of the counts line).

Scale factor: one positive number multiplies the lattice vectors (and Cartesian
coordinates); one negative number is the cell volume in Å³; three positive
numbers scale the x, y and z components (VASP convention, from memory).
Coordinate blocks whose line starts with ``C``/``K`` ("Cartesian") are Cartesian
Å (times the scale factor); all others are fractional ("Direct").

Positions are returned as VASP writes them, wrapped into the cell
(``kind="wrapped"``). The ``configuration=`` numbers are not returned as step
numbers: with ``NBLOCK`` > 1 they count output blocks, not MD steps, and the file
does not say which; ``steps`` is None. The LAMMPS-only ``units`` argument is
ignored here.

Speed: the coordinate lines of many frames are converted at once (fixed-width
columns, see :mod:`diffkit.io._parsing`); with a constant cell and fixed-width
lines the frames are not even walked one by one. Whatever that bulk path does
not recognise is read line by line, which names the file, frame and line of
any problem.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from . import FrameChunk
from ._parsing import (BadLine, FixedWidthLayout, chunk_frames, decode_fields, element_symbol,
                       is_number_line, normalize_type_map, opened, parse_columns, warn)

__all__ = ["sniff", "iter_chunks"]


def _is_config(line):
    """True for a frame's opening line (``Direct configuration=  12``, ``Cartesian ...``)."""
    s = line.strip().lower()
    return s.startswith(("direct", "cartesian", "konfig")) or "configuration" in s


def _is_cartesian(line):
    return line.lstrip()[:1] in ("C", "c", "K", "k") and not line.strip().lower().startswith(
        ("konfig", "configuration"))


def _ints(line):
    try:
        return [int(x) for x in line.split()]
    except ValueError:
        return None


def _floats(line):
    try:
        return [float(x) for x in line.split()]
    except ValueError:
        return None


def sniff(head: str) -> bool:
    """True when the first lines look like an XDATCAR header followed by a configuration line."""
    lines = head.splitlines()
    if len(lines) < 8:
        return False
    scale = _floats(lines[1])
    if not scale or len(scale) not in (1, 3):
        return False
    for line in lines[2:5]:
        v = _floats(line)
        if v is None or len(v) != 3:
            return False
    counts_at = 5 if _ints(lines[5]) else 6
    if not _ints(lines[counts_at]):
        return False
    return len(lines) > counts_at + 1 and _is_config(lines[counts_at + 1])


@dataclass
class _Header:
    species: tuple
    counts_line: str
    cell: np.ndarray  # (3, 3) Å
    cart_factor: np.ndarray  # (3,) multiplies Cartesian coordinate columns


class _XdatcarReader:
    def __init__(self, src, name, frames_per_chunk, type_map):
        self.src = src
        self.name = name
        self.frames_per_chunk = frames_per_chunk
        self.type_map = normalize_type_map(type_map, name)

    # -- messages -------------------------------------------------------------------
    def _error(self, frame, line, what):
        return InputError(f"{self.name}: frame {frame} (line {line}): {what}")

    # -- header ---------------------------------------------------------------------
    def _read_header(self, title, frame):
        src = self.src
        title_line = src.lineno
        body = src.take(5)
        if len(body) < 5:
            return None  # file ends inside the header
        scale = _floats(body[0])
        if not scale or len(scale) not in (1, 3) or not np.all(np.isfinite(scale)):
            raise self._error(frame, title_line + 1,
                              f"expected the scale factor (one or three numbers), found "
                              f"{body[0].strip()[:60]!r}")
        lattice = []
        for i in range(1, 4):
            v = _floats(body[i])
            if v is None or len(v) != 3 or not np.all(np.isfinite(v)):
                raise self._error(frame, title_line + 1 + i,
                                  f"expected a lattice vector (three numbers), found "
                                  f"{body[i].strip()[:60]!r}")
            lattice.append(v)
        lattice = np.array(lattice)
        names_line = body[4]
        counts = _ints(names_line)
        self._header_tail = [names_line]
        if counts is not None:  # VASP 4: no element names line
            counts_line, counts_lineno, names = names_line, title_line + 5, None
        else:
            counts_line = src.readline()
            counts_lineno = src.lineno
            if not counts_line:
                return None
            counts = _ints(counts_line)
            self._header_tail.append(counts_line)
            if not counts:
                raise self._error(frame, counts_lineno,
                                  f"expected the atom counts per element, found "
                                  f"{counts_line.strip()[:60]!r}")
            names = names_line.split()
        if any(c < 0 for c in counts) or sum(counts) == 0:
            raise self._error(frame, counts_lineno, f"atom counts {counts} hold no atoms")
        symbols = self._symbols(names, counts, frame, counts_lineno - 1)
        species = tuple(s for s, c in zip(symbols, counts) for _ in range(c))
        cell, factor = self._scale(scale, lattice, frame, title_line + 1)
        return _Header(species, " ".join(counts_line.split()), cell, factor)

    def _symbols(self, names, counts, frame, names_lineno):
        if names is None:
            if self.type_map is None:
                raise self._error(frame, names_lineno + 1,
                                  "no element names line (VASP 4 layout); give type_map="
                                  "{1: 'Li', 2: 'P', ...} naming the species in the order "
                                  "of the counts line")
            missing = [i for i in range(1, len(counts) + 1) if i not in self.type_map]
            if missing:
                raise self._error(frame, names_lineno + 1,
                                  f"type_map has no symbol for species number(s) {missing}")
            return [self.type_map[i] for i in range(1, len(counts) + 1)]
        if len(names) != len(counts):
            raise self._error(frame, names_lineno,
                              f"{len(names)} element names but {len(counts)} atom counts")
        symbols = []
        for nm in names:
            sym = element_symbol(nm)
            if sym is None:
                raise self._error(frame, names_lineno, f"unknown element {nm!r}")
            symbols.append(sym)
        return symbols

    def _scale(self, scale, lattice, frame, lineno):
        """Cell (Å) and Cartesian factor; ``lineno`` is the scale line, the lattice follows."""
        if abs(np.linalg.det(lattice)) < 1e-12:
            raise self._error(frame, lineno + 1, "lattice vectors span no volume")
        if len(scale) == 3:
            s = np.array(scale)
            if np.any(s <= 0):
                raise self._error(frame, lineno,
                                  f"three scale factors must be positive, got {scale}")
            return lattice * s[None, :], s
        s = scale[0]
        if s == 0:
            raise self._error(frame, lineno, "scale factor is zero")
        if s < 0:  # the volume in Å³
            s = (-s / abs(np.linalg.det(lattice))) ** (1.0 / 3.0)
        cell = lattice * s
        if abs(np.linalg.det(cell)) < 1e-12:
            raise self._error(frame, lineno, f"scale factor {scale[0]:g} leaves no volume")
        return cell, np.full(3, s)

    # -- frames ---------------------------------------------------------------------
    def chunks(self):
        src = self.src
        first = src.next_nonblank()
        if not first:
            raise InputError(f"{self.name}: line 1: file is empty, expected an XDATCAR header")
        title_lineno = src.lineno
        header = self._read_header(first, 1)
        if header is None:
            raise InputError(f"{self.name}: frame 1 (line {src.lineno}): the file ends inside "
                             "the header; no complete frame")
        self.header = header
        self.title = first.strip()
        self.title_line = first
        self.header_lines = src.lineno - title_lineno + 1
        self._names_counts = list(self._header_tail)
        n = len(header.species)
        self.n = n
        k = chunk_frames(self.frames_per_chunk, n)
        cfg = src.readline()
        if not cfg:
            raise InputError(f"{self.name}: frame 1 (line {src.lineno}): no frame after the "
                             "header; no complete frame")
        if not _is_config(cfg):
            raise self._error(1, src.lineno, f"expected a 'Direct configuration=' line, found "
                                             f"{cfg.strip()[:60]!r}")
        # the frame whose coordinate lines come next: its configuration line, cell, factor
        self.next = (cfg, header.cell, header.cart_factor, src.lineno)
        self.repeated = None   # header repeated before every frame (variable cell)? unknown yet
        self.n_done = 0        # complete frames read
        self.last_lines = None
        self.layout = None
        pieces, count, first_in_chunk = [], 0, 0
        bulk = True
        while True:
            if bulk:
                status, m = self._bulk(k - count, pieces)
                count += m
                if count == k:
                    yield self._build(pieces, first_in_chunk, n)
                    first_in_chunk += count
                    pieces, count = [], 0
                if status == "end":
                    break
                if status == "more":
                    continue
                bulk = False  # line by line until this chunk is full
            if not self._careful_body(pieces):
                break
            count += 1
            if count == k:
                yield self._build(pieces, first_in_chunk, n)
                first_in_chunk += count
                pieces, count = [], 0
                bulk = True
            if not self._careful_header():
                break
        if pieces:
            yield self._build(pieces, first_in_chunk, n)
        elif self.n_done == 0:
            raise InputError(f"{self.name}: no complete frame (the first frame, line "
                             f"{src.lineno}, is cut off)")

    # -- the careful path: one frame, line by line ----------------------------------------
    def _careful_body(self, pieces):
        """Read the coordinate lines of the next frame; False when the file ends inside them."""
        n = self.n
        cfg, cell, factor, cfg_lineno = self.next
        frame = self.n_done + 1
        lines = self.src.take(n)
        if len(lines) < n:
            self._dropped(frame, cfg_lineno, len(lines), n)
            return False
        pieces.append(("lines", lines, cell, factor if _is_cartesian(cfg) else None, cfg_lineno))
        self.last_lines, self.last_cfg = lines, cfg_lineno
        self.n_done += 1
        return True

    def _careful_header(self):
        """Read what follows a frame: its successor's configuration line (and header)."""
        src, n = self.src, self.n
        frame = self.n_done
        header = self.header
        line = src.next_nonblank()
        if not line:
            if src.cut:
                self._dropped(frame + 1, src.lineno, 0, n)
            return False
        start = src.lineno
        if _is_config(line):
            cfg_tuple = self.next
            self.next = (line, cfg_tuple[1], cfg_tuple[2], src.lineno)
            return True
        if is_number_line(line, 3):
            self._atom_count_error(self.n_done, self.last_cfg, self.last_lines, n)
        new = self._read_header(line, frame + 1)
        if new is None:
            self._dropped(frame + 1, start, 0, n)
            return False
        if len(new.species) != n:
            raise self._error(frame + 1, start, f"{len(new.species)} atoms, expected {n}")
        if new.species != header.species:
            raise self._error(frame + 1, start,
                              "element names or counts differ from the first frame's")
        cfg = src.readline()
        if not cfg:
            self._dropped(frame + 1, start, 0, n)
            return False
        if not _is_config(cfg):
            raise self._error(frame + 1, src.lineno, f"expected a 'Direct configuration=' "
                                                     f"line, found {cfg.strip()[:60]!r}")
        self.next = (cfg, new.cell, new.cart_factor, src.lineno)
        return True

    # -- the bulk path: many frames at once -----------------------------------------------
    def _bulk(self, want, pieces):
        """Read up to ``want`` frames in bulk.

        Returns ``(status, m)``: ``m`` frames appended to ``pieces`` as one
        decoded piece; status "more" (go on in bulk), "end" (the file ended
        cleanly after the last of them) or "stuck" (the next frame needs the
        careful path; nothing of it was read).
        """
        src, n = self.src, self.n
        if (self.repeated is False and self.layout is not None and self.layout.ok
                and self.next[0].lstrip().lower().startswith(("direct", "cartesian"))):
            got = self._bulk_periodic(want, pieces)
            if got is not None:
                return got
        est = getattr(self, "_frame_bytes", 64 * (n + 8))
        src.fill(int(est * want * 1.05) + 4096)
        buf, p0 = src.buf, src.pos
        repeated = self.repeated
        if repeated is None:
            marker = None
        elif repeated:
            marker = b"\n" + self.title_line.encode("utf-8")
        else:
            marker = b"\n" + self.next[0].split()[0].encode("utf-8")
        bodies, cfgs, marks, keys = [], [], [], []
        cfg, cell, factor, cfg_lineno = self.next
        p = p0
        nlines = 0
        status = "stuck"
        while len(bodies) < want:
            if marker is None:  # the second frame tells whether the header repeats
                marker = self._learn_layout(buf, p)
                if marker is None:
                    break
                repeated = self.repeated
            lay = self.layout
            e = p + n * lay.width if lay is not None and lay.ok else -1
            if 0 < e <= len(buf) and buf[e - 1] == 10 and (
                    buf.startswith(marker, e - 1) or (e == len(buf) and src.eof)):
                # fixed-width lines: the decoder checks every line's length and newline
                q = e - 1 if e < len(buf) else -1
            else:
                q = buf.find(marker, p)
                if q < 0 and not bodies and not src.eof:
                    src.fill(2 * (len(buf) - p0) + 4096)  # not even one frame in view
                    buf, p0, p = src.buf, src.pos, src.pos
                    continue
                if q < 0:
                    if not src.eof or not buf.endswith(b"\n"):
                        status = "more" if bodies else "stuck"
                        break
                    e = len(buf)
                else:
                    e = q + 1
                if buf.count(b"\n", p, e) != n:
                    break
            if q < 0:  # the last frame of the file
                bodies.append((p, e))
                cfgs.append((cfg, cfg_lineno))
                nlines += n
                p = e
                marks.append((p, nlines, None))
                status = "end"
                break
            nxt = self._bulk_header(buf, e, cfg_lineno + n)
            if nxt is None:
                break
            bodies.append((p, e))
            cfgs.append((cfg, cfg_lineno))
            (cfg, cfg_lineno, key), p, used = nxt
            nlines += n + used
            marks.append((p, nlines, (cfg, cfg_lineno)))
            keys.append(key)
        else:
            status = "more"
        # the cells: the first frame's is known, each header read gives the next frame's
        cells = [(cell, factor)]
        if repeated and keys:
            cells += self._cells_of(keys)
            if len(cells) < len(bodies) + (status != "end"):  # a header only the careful path reads
                keep = len(cells) - 1
                bodies, cfgs, marks = bodies[:keep], cfgs[:keep], marks[:keep]
                status = "stuck"
        else:
            cells = cells * (len(bodies) + 1)
        if not bodies:
            return ("end", 0) if status == "end" else ("stuck", 0)
        m = len(bodies)
        values = self._decode_bodies(buf, bodies)
        if values is None:
            return "stuck", 0
        p, nlines, nxt = marks[-1]
        self._frame_bytes = max(64, (p - p0) / m)
        factors = [f if _is_cartesian(c) else None for (c, _), (_, f) in zip(cfgs, cells)]
        pieces.append(("values", values.reshape(m, n, 3), np.array([c for c, _ in cells[:m]]),
                       factors, [ln for _, ln in cfgs]))
        self.n_done += m
        if nxt is not None:
            self.next = (nxt[0], cells[m][0], cells[m][1], nxt[1])
        src.consume(p - p0, nlines)
        return status, m

    def _cells_of(self, keys):
        """(cell, factor) of each repeated header's scale and lattice lines, read together.

        Stops before the first header that only the careful path may judge.
        """
        m = len(keys)
        scales = decode_fields(b"".join(k[0] for k in keys), m, 1, [0], dotted=[0])
        lattices = decode_fields(b"".join(k[1] for k in keys), 3 * m, 3, [0, 1, 2],
                                 dotted=[0, 1, 2])
        if scales is not None and lattices is not None and (scales[0] > 0).all():
            s = scales[0][:, 0]
            lattice = lattices[0].reshape(m, 3, 3)
            cells = lattice * s[:, None, None]
            bad = (np.abs(np.linalg.det(lattice)) < 1e-12) | (np.abs(np.linalg.det(cells)) < 1e-12)
            good = m if not bad.any() else int(np.argmax(bad))
            return [(cells[i], np.full(3, s[i])) for i in range(good)]
        out = []  # one by one, as the careful path reads them
        for scale_line, lattice_lines in keys:
            lines = [x.decode("utf-8", "replace") for x in
                     [scale_line] + lattice_lines.splitlines(keepends=True)]
            new = _parse_cell(lines)
            if new is None:
                break
            try:
                out.append(self._scale(new[0], new[1], 0, 0))
            except InputError:
                break
        return out

    def _bulk_periodic(self, want, pieces):
        """Constant cell, fixed-width lines: every frame has the same length; no loop over frames.

        Returns ``(status, m)`` as :meth:`_bulk`, or None when the frames in view
        do not have that layout (the general bulk path then reads them).
        """
        src, n, lay = self.src, self.n, self.layout
        body = n * lay.width
        cfg, cell, factor, cfg_lineno = self.next
        word = cfg.split()[0].encode("utf-8")
        src.fill(int(getattr(self, "_frame_bytes", body + 32) * want * 1.05) + 4096)
        buf, p0 = src.buf, src.pos
        e = p0 + body
        if e >= len(buf) or not buf.startswith(word, e):
            return None
        r = buf.find(b"\n", e)
        if r < 0:
            return None
        period = body + r + 1 - e  # coordinate lines and the next configuration line
        m = min(want, (len(buf) - p0) // period)
        if m < 1:
            return None
        cfgs = np.ndarray((m, r + 1 - e), np.uint8, buffer=buf, offset=e, strides=(period, 1))
        good = (cfgs[:, :len(word)] == np.frombuffer(word, np.uint8)).all(axis=1)
        good &= cfgs[:, -1] == 10
        good &= ~(cfgs[:, :-1] == 10).any(axis=1)
        if not good.all():
            m = int(np.argmin(good))
            if m < 1:
                return None
        rows = np.ndarray((m, n, lay.width), np.uint8, buffer=buf, offset=p0,
                          strides=(period, lay.width, 1))
        values = lay.decode(rows)
        del rows, cfgs
        if values is None:
            return None
        last = e + (m - 1) * period
        nxt = buf[last:last + period - body].decode("utf-8", "replace")
        f = factor if _is_cartesian(cfg) else None
        pieces.append(("values", values.reshape(m, n, 3), np.broadcast_to(cell, (m, 3, 3)),
                       [f] * m, None))
        self.n_done += m
        self.next = (nxt, cell, factor, cfg_lineno + m * (n + 1))
        self._frame_bytes = period
        src.consume(m * period, m * (n + 1))
        return "more", m

    def _learn_layout(self, buf, p):
        """After the first frame's coordinates: does a header or a configuration line follow?"""
        e = buf.find(b"\n", p)
        for _ in range(self.n - 1):
            if e < 0:
                return None
            e = buf.find(b"\n", e + 1)
        if e < 0 or e + 1 >= len(buf):
            return None
        e += 1
        line = buf[e:buf.find(b"\n", e) + 1].decode("utf-8", "replace")
        if _is_config(line):
            self.repeated = False
            return b"\n" + self.next[0].split()[0].encode("utf-8")
        if line == self.title_line:
            self.repeated = True
            return b"\n" + self.title_line.encode("utf-8")
        return None

    def _bulk_header(self, buf, e, lineno):
        """Read what follows a frame's coordinates at ``buf[e:]`` without raising.

        Returns ((cfg, cfg_lineno, key), position after it, lines used), where
        ``key`` holds a repeated header's scale line and lattice lines (bytes)
        or is None; or None when it is not a clean configuration line (and header).
        """
        lines = []
        q = e
        for _ in range(self.header_lines + 1 if self.repeated else 1):
            r = buf.find(b"\n", q)
            if r < 0:
                return None
            lines.append(buf[q:r + 1])
            q = r + 1
        key = None
        if self.repeated:
            head = [x.decode("utf-8", "replace") for x in lines[:1] + lines[5:-1]]
            if head[0] != self.title_line or head[1:] != self._names_counts:
                return None
            key = (lines[1], b"".join(lines[2:5]))
        cfg = lines[-1].decode("utf-8", "replace")
        if not _is_config(cfg) or not cfg.endswith("\n"):
            return None
        return (cfg, lineno + len(lines), key), q, len(lines)

    def _decode_bodies(self, buf, bodies):
        """(m * n, 3) numbers of the frames' coordinate lines, or None."""
        n = self.n
        view = memoryview(buf)
        data = b"".join(view[a:b] for a, b in bodies)
        sizes = {b - a for a, b in bodies}
        if self.layout is None:
            first = buf[bodies[0][0]:buf.find(b"\n", bodies[0][0]) + 1]
            self.layout = FixedWidthLayout(first)
        lay = self.layout
        if lay.ok and sizes == {n * lay.width}:
            rows = np.frombuffer(data, np.uint8).reshape(-1, lay.width)
            values = lay.decode(rows)
            if values is not None:
                return values
            # frames were cut by length: make sure each holds n lines before reading by fields
            if any(buf.count(b"\n", a, b) != n for a, b in bodies):
                return None
        got = decode_fields(data, n * len(bodies), 3, (0, 1, 2), dotted=(0, 1, 2))
        return None if got is None else got[0]

    def _dropped(self, frame, lineno, got, n):
        how = f"the file ends after {got} of its {n} atom lines"
        if self.src.cut:
            how += ", the last one cut mid-line"
        if frame == 1:
            raise InputError(f"{self.name}: frame 1 (line {lineno}) is cut off ({how}); "
                             "no complete frame")
        warn(f"{self.name}: frame {frame} (line {lineno}) is cut off ({how}); dropped it and "
             f"kept the {frame - 1} complete frames before it")

    def _atom_count_error(self, frame, cfg_lineno, lines, n):
        """Frame ``frame`` ran into the next frame or has extra lines: say how many atoms it has."""
        for i, line in enumerate(lines):
            if not is_number_line(line, 3):
                raise self._error(frame, cfg_lineno, f"{i} atoms, expected {n}")
        extra = 1
        while extra < n:
            line = self.src.readline()
            if not line or not is_number_line(line, 3):
                break
            extra += 1
        raise self._error(frame, cfg_lineno, f"{n + extra} atoms, expected {n}")

    def _build(self, pieces, first_frame, n):
        values, cells, factors = [], [], []
        j = 0  # frame index within the chunk
        for piece in pieces:
            if piece[0] == "values":
                _, vals, c, f, _ = piece
                values.append(vals)
                cells.append(c)
                factors.extend(f)
                j += len(vals)
                continue
            _, lines, cell, factor, cfg_lineno = piece
            try:
                vals = parse_columns(lines, (0, 1, 2), min_fields=3)
            except BadLine as bad:
                i = bad.index
                frame = first_frame + j + 1
                if _is_config(lines[i]) or lines[i].strip() == self.title:
                    raise self._error(frame, cfg_lineno, f"{i} atoms, expected {n}") from None
                raise self._error(frame, cfg_lineno + 1 + i, bad.reason) from None
            values.append(vals.reshape(1, n, 3))
            cells.append(cell[None])
            factors.append(factor)
            j += 1
        values = np.concatenate(values)
        cells = np.concatenate(cells)
        positions = np.matmul(values, cells)
        for i, f in enumerate(factors):
            if f is not None:  # Cartesian block
                positions[i] = values[i] * f[None, :]
        return FrameChunk(species=self.header.species, cells=cells, positions=positions,
                          kind="wrapped", first_frame=first_frame, source=self.name)


def _parse_cell(lines):
    """(scale, lattice) from the scale and three lattice lines, or None if they are not clean."""
    scale = _floats(lines[0])
    if not scale or len(scale) not in (1, 3) or not np.all(np.isfinite(scale)):
        return None
    lattice = []
    for line in lines[1:4]:
        v = _floats(line)
        if v is None or len(v) != 3 or not np.all(np.isfinite(v)):
            return None
        lattice.append(v)
    return scale, np.array(lattice)


def iter_chunks(path, *, frames_per_chunk=1000, type_map=None, units=None):
    """Read an XDATCAR in chunks of frames.

    Parameters
    ----------
    path : str, path-like or open file
        Plain, gzip, bz2 or xz (told by content).
    frames_per_chunk : int
        Frames per chunk (fewer for very large systems, to bound memory).
    type_map : dict of int -> str, optional
        Element symbols for a VASP 4 file without a names line.
    units : ignored
        XDATCAR is always Å.

    Yields
    ------
    FrameChunk
        ``cells`` (k, 3, 3) Å, ``positions`` (k, n_atoms, 3) Cartesian Å, wrapped.

    Raises
    ------
    InputError
        Empty file, no complete frame, atom count or species changing, text or
        NaN where coordinates belong, unknown element, lattice vectors without
        volume. A cut-off last frame is dropped with a
        :class:`~diffkit.errors.DiffkitWarning`.
    """
    with opened(path) as (src, name):
        yield from _XdatcarReader(src, name, frames_per_chunk, type_map).chunks()
