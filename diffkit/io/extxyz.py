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
"""

from __future__ import annotations

import math
import re

import numpy as np

from ..errors import InputError, UnitsError
from ..units import parse_time_ps
from . import FrameChunk
from ._parsing import (BadLine, CutOff, LineSource, chunk_frames, element_symbol,
                       normalize_type_map, opened, parse_columns, warn)

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


class _XyzReader:
    def __init__(self, stream, name, frames_per_chunk, type_map):
        self.src = LineSource(stream, name)
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
        lines = src.take(n)
        if len(lines) < n:
            raise CutOff(start, len(lines), n, src.cut)
        self._last_start, self._last_lines = start, lines
        return start, cell, time, step, lines

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
        pending, n_done, first_in_chunk, k = [], 0, 0, None
        while True:
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
            pending.append(fr)
            n_done += 1
            if k is None:
                k = chunk_frames(self.frames_per_chunk, self.n)
            if len(pending) == k:
                yield self._build(pending, first_in_chunk)
                first_in_chunk += len(pending)
                pending = []
        if pending:
            yield self._build(pending, first_in_chunk)
        elif n_done == 0:
            raise InputError(f"{self.name}: line 1: file is empty, expected extended XYZ frames")

    def _build(self, frames, first_frame):
        lay, n, k = self.layout, self.n, len(frames)
        all_lines = [line for fr in frames for line in fr[4]]
        try:
            data = parse_columns(all_lines, lay.usecols, lay.n_fields)
        except BadLine as bad:
            j, i = divmod(bad.index, n)
            text = all_lines[bad.index].strip()
            if text.isdigit():
                raise self._error(first_frame + j + 1, frames[j][0],
                                  f"{i} atom lines, but its count line says {n}") from None
            raise self._error(first_frame + j + 1, frames[j][0] + 2 + i, bad.reason) from None
        data = data.reshape(k, n, -1)
        cells = np.array([fr[1] for fr in frames], dtype=float).reshape(k, 3, 3)
        flat = np.flatnonzero(np.abs(np.linalg.det(cells)) < 1e-12)
        if flat.size:
            j = int(flat[0])
            raise self._error(first_frame + j + 1, frames[j][0] + 1, "Lattice= spans no volume")
        names = np.loadtxt(all_lines, dtype=str, usecols=[lay.species_col], comments=None,
                           ndmin=1).reshape(k, n)
        if self.species is None:
            self.species = self._symbols(names[0], frames[0][0], first_frame + 1)
            self._raw_names = names[0].copy()
        bad = np.flatnonzero(np.any(names != self._raw_names, axis=1))
        if bad.size:
            j = int(bad[0])
            a = int(np.flatnonzero(names[j] != self._raw_names)[0])
            raise self._error(first_frame + j + 1, frames[j][0] + 2 + a,
                              f"atom {a + 1} is {names[j, a]!r}, was {self._raw_names[a]!r} in "
                              "the first frame")
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
    with opened(path) as (stream, name):
        yield from _XyzReader(stream, name, frames_per_chunk, type_map).chunks()
