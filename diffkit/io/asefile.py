"""Fallback reader: any trajectory :func:`ase.io.iread` can read (vasprun.xml, .traj, ...).

Chosen by file extension or an explicit ``format="asefile"``, never by content
(:func:`sniff` is always False). Frames are taken as ASE gives them:

- cells and Cartesian positions in Å; positions are treated as wrapped
  (``kind="wrapped"``) because ASE does not say; unwrapping works on either;
- velocities, where the frames carry momenta, converted from ASE units to Å/ps
  (1 ps = 1000 · ``ase.units.fs`` ASE time units);
- times where ``atoms.info`` holds ``time_ps``, ``time_fs`` or ``time`` (fs, as
  in the extended XYZ reader, with a warning); steps from ``step``/``timestep``.

``type_map`` and the LAMMPS-only ``units`` are ignored.
"""

from __future__ import annotations

import os

import numpy as np

from ..errors import InputError
from ..units import parse_time_ps
from . import FrameChunk, source_name
from ._parsing import chunk_frames, element_symbol, warn

__all__ = ["sniff", "iter_chunks"]


def sniff(head: str) -> bool:
    """Always False: this reader is chosen by extension or by name, not by content."""
    return False


def _time_ps(info, name, warned):
    for key, factor in (("time_ps", 1.0), ("time_fs", parse_time_ps("1fs")),
                        ("time", parse_time_ps("1fs"))):
        if key in info:
            if key == "time" and not warned:
                warned.append(True)
                warn(f"{name}: frame info 'time' has no unit; taken as fs")
            try:
                t = float(info[key]) * factor
            except (TypeError, ValueError):
                return None
            return t if np.isfinite(t) else None
    return None


def iter_chunks(path, *, frames_per_chunk=1000, type_map=None, units=None):
    """Read a trajectory through :func:`ase.io.iread` in chunks of frames.

    Parameters
    ----------
    path : str, path-like or open file
        An open file is passed to ASE as it is; ASE may need a file name to tell
        the format.
    frames_per_chunk : int
    type_map, units : ignored

    Yields
    ------
    FrameChunk
        ``cells`` (k, 3, 3) Å, ``positions`` (k, n_atoms, 3) Å, ``velocities``
        Å/ps where present.

    Raises
    ------
    InputError
        ASE cannot read the file (the message carries ASE's reason and the frame
        reached), no frame, atom count or species changing, non-finite
        positions, unknown element.
    """
    import ase.io
    import ase.units

    name = source_name(path)
    arg = os.fspath(path) if isinstance(path, (str, os.PathLike)) else path
    if isinstance(arg, str) and not os.path.exists(arg):
        raise InputError(f"{name}: no such file")
    vel_factor = 1000.0 * ase.units.fs  # Å per ASE time unit -> Å/ps
    warned = []
    species = None
    k = None
    batch = []
    n_done = 0
    first_in_chunk = 0

    def build(frames, first):
        cells = np.array([a.cell[:] for a in frames], dtype=float)
        pos = np.array([a.positions for a in frames], dtype=float)
        vel = None
        if all("momenta" in a.arrays for a in frames):
            vel = np.array([a.get_velocities() for a in frames], dtype=float) * vel_factor
        times = [_time_ps(a.info, name, warned) for a in frames]
        steps = [a.info.get("step", a.info.get("timestep")) for a in frames]
        try:
            steps = None if any(s is None for s in steps) else np.array(steps, dtype=np.int64)
        except (TypeError, ValueError):
            steps = None
        return FrameChunk(species=species, cells=cells, positions=pos, kind="wrapped",
                          velocities=vel, first_frame=first, source=name,
                          times_ps=None if any(t is None for t in times) else np.array(times),
                          steps=steps)

    frames = ase.io.iread(arg, index=":")
    while True:
        frame = n_done + 1
        try:
            atoms = next(frames)
        except StopIteration:
            break
        except Exception as exc:  # ASE raises many kinds; report them as bad input
            where = f"frame {frame}" + (" (after the last good frame)" if n_done else "")
            raise InputError(f"{name}: {where}: ASE could not read it "
                             f"({type(exc).__name__}: {str(exc)[:200]})") from exc
        syms = tuple(atoms.get_chemical_symbols())
        if species is None:
            for s in set(syms):
                if element_symbol(s) != s:
                    raise InputError(f"{name}: frame 1: unknown element {s!r}")
            species = syms
            k = chunk_frames(frames_per_chunk, len(species))
        elif len(syms) != len(species):
            raise InputError(f"{name}: frame {frame}: {len(syms)} atoms, expected {len(species)}")
        elif syms != species:
            raise InputError(f"{name}: frame {frame}: species or their order differ from frame 1's")
        if not np.isfinite(atoms.positions).all() or not np.isfinite(atoms.cell[:]).all():
            raise InputError(f"{name}: frame {frame}: positions or cell are not finite numbers")
        if abs(atoms.cell.volume) < 1e-12:
            raise InputError(f"{name}: frame {frame}: no periodic cell (diffusion in a periodic "
                             "cell needs one)")
        batch.append(atoms)
        n_done += 1
        if len(batch) == k:
            yield build(batch, first_in_chunk)
            first_in_chunk += len(batch)
            batch = []
    if batch:
        yield build(batch, first_in_chunk)
    elif n_done == 0:
        raise InputError(f"{name}: ASE found no frame in the file")
