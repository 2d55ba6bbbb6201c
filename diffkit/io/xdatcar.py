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
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from . import FrameChunk
from ._parsing import (BadLine, LineSource, chunk_frames, element_symbol, is_number_line,
                       normalize_type_map, opened, parse_columns, warn)

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
    def __init__(self, stream, name, frames_per_chunk, type_map):
        self.src = LineSource(stream, name)
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
        if counts is not None:  # VASP 4: no element names line
            counts_line, counts_lineno, names = names_line, title_line + 5, None
        else:
            counts_line = src.readline()
            counts_lineno = src.lineno
            if not counts_line:
                return None
            counts = _ints(counts_line)
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
            det = abs(np.linalg.det(lattice))
            if det == 0:
                raise self._error(frame, lineno, "lattice vectors span no volume")
            s = (-s / det) ** (1.0 / 3.0)
        return lattice * s, np.full(3, s)

    # -- frames ---------------------------------------------------------------------
    def chunks(self):
        src = self.src
        first = src.next_nonblank()
        if not first:
            raise InputError(f"{self.name}: line 1: file is empty, expected an XDATCAR header")
        header = self._read_header(first, 1)
        if header is None:
            raise InputError(f"{self.name}: frame 1 (line {src.lineno}): the file ends inside "
                             "the header; no complete frame")
        self.header = header
        self.title = first.strip()
        n = len(header.species)
        k = chunk_frames(self.frames_per_chunk, n)
        cfg = src.readline()
        if not cfg:
            raise InputError(f"{self.name}: frame 1 (line {src.lineno}): no frame after the "
                             "header; no complete frame")
        if not _is_config(cfg):
            raise self._error(1, src.lineno, f"expected a 'Direct configuration=' line, found "
                                             f"{cfg.strip()[:60]!r}")
        cell, factor = header.cell, header.cart_factor
        pending = []  # (coordinate lines, cell, factor or None for Direct, config line number)
        n_done = 0  # complete frames yielded or pending
        first_in_chunk = 0
        last_lines, last_cfg = None, None
        while True:
            cfg_lineno = src.lineno
            frame = n_done + 1
            lines = src.take(n)
            if len(lines) < n:
                self._dropped(frame, cfg_lineno, len(lines), n)
                break
            pending.append((lines, cell, factor if _is_cartesian(cfg) else None, cfg_lineno))
            last_lines, last_cfg = lines, cfg_lineno
            n_done += 1
            if len(pending) == k:
                yield self._build(pending, first_in_chunk, n)
                first_in_chunk += len(pending)
                pending = []
            line = src.next_nonblank()
            if not line:
                if src.cut:
                    self._dropped(frame + 1, src.lineno, 0, n)
                break
            start = src.lineno
            if _is_config(line):
                cfg = line
                continue
            if is_number_line(line, 3):
                self._atom_count_error(n_done, last_cfg, last_lines, n)
            new = self._read_header(line, frame + 1)
            if new is None:
                self._dropped(frame + 1, start, 0, n)
                break
            if len(new.species) != n:
                raise self._error(frame + 1, start, f"{len(new.species)} atoms, expected {n}")
            if new.species != header.species:
                raise self._error(frame + 1, start,
                                  "element names or counts differ from the first frame's")
            cell, factor = new.cell, new.cart_factor
            cfg = src.readline()
            if not cfg:
                self._dropped(frame + 1, start, 0, n)
                break
            if not _is_config(cfg):
                raise self._error(frame + 1, src.lineno, f"expected a 'Direct configuration=' "
                                                         f"line, found {cfg.strip()[:60]!r}")
        if pending:
            yield self._build(pending, first_in_chunk, n)
        elif n_done == 0:
            raise InputError(f"{self.name}: no complete frame (the first frame, line "
                             f"{src.lineno}, is cut off)")

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

    def _build(self, pending, first_frame, n):
        all_lines = list(itertools.chain.from_iterable(p[0] for p in pending))
        try:
            values = parse_columns(all_lines, (0, 1, 2), min_fields=3)
        except BadLine as bad:
            j, i = divmod(bad.index, n)
            lines, _, _, cfg_lineno = pending[j]
            frame = first_frame + j + 1
            if _is_config(lines[i]) or lines[i].strip() == self.title:
                raise self._error(frame, cfg_lineno, f"{i} atoms, expected {n}") from None
            raise self._error(frame, cfg_lineno + 1 + i, bad.reason) from None
        values = values.reshape(len(pending), n, 3)
        cells = np.array([p[1] for p in pending])
        positions = np.matmul(values, cells)
        for j, p in enumerate(pending):
            if p[2] is not None:  # Cartesian block
                positions[j] = values[j] * p[2][None, :]
        return FrameChunk(species=self.header.species, cells=cells, positions=positions,
                          kind="wrapped", first_frame=first_frame, source=self.name)


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
        NaN where coordinates belong, unknown element. A cut-off last frame is
        dropped with a :class:`~diffkit.errors.DiffkitWarning`.
    """
    with opened(path) as (stream, name):
        yield from _XdatcarReader(stream, name, frames_per_chunk, type_map).chunks()
