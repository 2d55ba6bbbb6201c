"""The HDF5 run file: one run's unwrapped trajectory, its results and provenance.

Layout (every dataset's unit in its ``unit`` attribute)::

    /                       attrs: diffkit_file="run", layout_version, diffkit_version,
                                   created_utc, provenance (JSON), temperature_K,
                                   frame_interval_ps
    /frames/positions       (n_frames, n_atoms, 3) float64, Å, unwrapped, raw (no drift removed)
    /frames/cells           (n_frames, 3, 3) float64, Å, rows are lattice vectors
    /frames/times           (n_frames,) float64, ps
    /frames/velocities      (n_frames, n_atoms, 3) float64, Å/ps (only where the files had them)
    /atoms/species          (n_atoms,) UTF-8 element symbols
    /atoms/masses           (n_atoms,) float64, amu
    /centre_of_mass/<El>    (n_frames, 3) float64, Å, mass-weighted, per species
    /results/<name>         attrs: json (a result's to_dict()), written by later stages

Positions are chunked as (frames, 8 atoms, 3) so that a block of atoms across
all frames reads fast; chunks are uncompressed unless asked (random-walk
positions barely compress and compression slows block reads several-fold).
"""

from __future__ import annotations

import json
import os
from datetime import datetime, timezone

import numpy as np

from ..errors import InputError
from .atomic import atomic_path

__all__ = ["save_trajectory", "ingest", "open_run", "write_result", "read_results",
           "LAYOUT_VERSION"]

LAYOUT_VERSION = 1
_ATOMS_PER_CHUNK = 8
_CHUNK_BYTES = 1 << 20


def _h5py():
    import h5py

    return h5py


def _frames_per_chunk(n_atoms):
    per_frame = min(n_atoms, _ATOMS_PER_CHUNK) * 3 * 8
    return int(max(16, min(8192, _CHUNK_BYTES // per_frame)))


def _as_slice(idx):
    """A slice for consecutive indices (a view instead of a copy when taking them)."""
    if len(idx) and np.all(np.diff(idx) == 1):
        return slice(int(idx[0]), int(idx[-1]) + 1)
    return idx


class _RunWriter:
    """Write frames to a new run file as they come (bounded memory).

    Open the file with ``rdcc_nbytes=0``: positions are written in whole HDF5
    chunks, so the chunk cache gains nothing, and with it HDF5's memory grew
    by ~7 MB per small per-frame dataset over a long run before levelling off
    (measured: 48 -> 55 MB from 20,000 to 320,000 frames; flat without it).
    """

    def __init__(self, h5, species, masses, has_velocities, compression, buffer_MB=16.0):
        self.h5 = h5
        n = len(species)
        self.n_atoms = n
        self.fchunk = _frames_per_chunk(n)
        comp = {} if not compression else {"compression": compression, "shuffle": True}
        g = h5.create_group("frames")
        self.pos = g.create_dataset("positions", (0, n, 3), maxshape=(None, n, 3), dtype="f8",
                                    chunks=(self.fchunk, min(n, _ATOMS_PER_CHUNK), 3), **comp)
        self.pos.attrs["unit"] = "Å"
        self.pos.attrs["note"] = "unwrapped, Cartesian, raw (no drift removed)"
        self.cells = g.create_dataset("cells", (0, 3, 3), maxshape=(None, 3, 3), dtype="f8",
                                      chunks=(1024, 3, 3))
        self.cells.attrs["unit"] = "Å"
        self.cells.attrs["note"] = "rows are lattice vectors"
        self.times = g.create_dataset("times", (0,), maxshape=(None,), dtype="f8", chunks=(4096,))
        self.times.attrs["unit"] = "ps"
        self.vel = None
        if has_velocities:
            self.vel = g.create_dataset("velocities", (0, n, 3), maxshape=(None, n, 3), dtype="f8",
                                        chunks=(self.fchunk, min(n, _ATOMS_PER_CHUNK), 3), **comp)
            self.vel.attrs["unit"] = "Å/ps"
        a = h5.create_group("atoms")
        a.create_dataset("species", data=np.array([s.encode() for s in species]),
                         dtype=_h5py().string_dtype())
        m = a.create_dataset("masses", data=np.asarray(masses, dtype=float))
        m.attrs["unit"] = "amu"
        self.species = np.asarray(species, dtype=object)
        self.masses = np.asarray(masses, dtype=float)
        self.com = {s: [] for s in dict.fromkeys(species)}  # tracks of frames not yet written
        c = h5.create_group("centre_of_mass")
        c.attrs["note"] = "mass-weighted centre of mass of each species, unwrapped"
        self.com_ds = {}
        for s in self.com:  # written as the frames come, so memory does not grow with them
            self.com_ds[s] = c.create_dataset(s, (0, 3), maxshape=(None, 3), dtype="f8",
                                              chunks=(4096, 3))
            self.com_ds[s].attrs["unit"] = "Å"
        # frames are copied into one preallocated buffer of whole HDF5 chunks and written
        # when it is full, so each chunk is written once and no reader chunk is kept alive
        self.buffer_frames = max(self.fchunk, int(buffer_MB * 2**20 // (n * 24)) // self.fchunk
                                 * self.fchunk)
        self._groups = [_as_slice(np.flatnonzero(self.species == s)) for s in self.com]
        self._bt = self._bc = self._bp = self._bv = None
        self._buffered = 0
        self.n_frames = 0

    def _allocate(self):
        m, n = self.buffer_frames, self.n_atoms
        self._bt = np.empty(m)
        self._bc = np.empty((m, 3, 3))
        self._bp = np.empty((m, n, 3))
        self._bv = None if self.vel is None else np.empty((m, n, 3))

    def append(self, times, cells, positions, velocities):
        done, k = 0, len(times)
        while done < k:
            if self._bt is None:
                self._allocate()
            a = self._buffered
            take = min(k - done, self.buffer_frames - a)
            sl = slice(done, done + take)
            self._bt[a:a + take] = times[sl]
            self._bc[a:a + take] = cells[sl]
            self._bp[a:a + take] = positions[sl]
            if self._bv is not None:
                self._bv[a:a + take] = velocities[sl]
            for (s, parts), idx in zip(self.com.items(), self._groups):
                w = self.masses[idx]
                parts.append(np.einsum("a,fax->fx", w, self._bp[a:a + take, idx, :]) / w.sum())
            self._buffered += take
            done += take
            if self._buffered >= self.buffer_frames:
                self.flush()

    def flush(self):
        m = self._buffered
        if not m:
            return
        a, b = self.n_frames, self.n_frames + m
        for ds, data in ((self.times, self._bt), (self.cells, self._bc), (self.pos, self._bp),
                         (self.vel, self._bv)):
            if ds is None:
                continue
            ds.resize(b, axis=0)
            ds[a:b] = data[:m]
        for s, parts in self.com.items():
            self.com_ds[s].resize(b, axis=0)
            self.com_ds[s][a:b] = np.concatenate(parts)
            parts.clear()
        self._buffered = 0
        self.n_frames = b

    def close(self):
        self.flush()


def _write_root_attrs(h5, temperature_K, frame_interval_ps, provenance):
    from .. import __version__

    h5.attrs["diffkit_file"] = "run"
    h5.attrs["layout_version"] = LAYOUT_VERSION
    h5.attrs["diffkit_version"] = __version__
    h5.attrs["created_utc"] = datetime.now(timezone.utc).isoformat(timespec="seconds")
    h5.attrs["provenance"] = json.dumps(provenance or {}, default=str)
    h5.attrs["temperature_K"] = np.nan if temperature_K is None else float(temperature_K)
    h5.attrs["frame_interval_ps"] = np.nan if frame_interval_ps is None else float(frame_interval_ps)


def save_trajectory(traj, path, *, compression=None):
    """Write a :class:`~diffkit.Trajectory` to a run file, atomically.

    Parameters
    ----------
    traj : Trajectory
    path : str or path-like
        The run file to create (replaced if it exists).
    compression : str, optional
        HDF5 filter for positions (e.g. ``"gzip"``); none by default.

    Returns
    -------
    str
        The path written.
    """
    h5py = _h5py()
    with atomic_path(path) as tmp:
        with h5py.File(tmp, "w", rdcc_nbytes=0) as h5:  # no chunk cache (_RunWriter)
            w = _RunWriter(h5, list(traj.species), traj.masses, traj.has_velocities, compression)
            for a in range(0, traj.n_frames, w.fchunk * 8):
                b = min(traj.n_frames, a + w.fchunk * 8)
                pos = np.asarray(traj._positions[a:b], dtype=float)
                vel = None if not traj.has_velocities else np.asarray(traj._velocities[a:b])
                w.append(traj.times_ps[a:b], traj.cells[a:b], pos, vel)
            w.close()
            _write_root_attrs(h5, traj.temperature_K, traj.frame_interval_ps, traj.provenance)
    return os.fspath(path)


def ingest(paths, out_path, options=None, *, compression=None, progress=None):
    """Read trajectory files and write them to a run file chunk by chunk.

    Memory stays bounded by the chunk size whatever the length of the files.

    Parameters
    ----------
    paths : path or sequence of paths
        Consecutive parts of one run.
    out_path : str or path-like
        The run file to create (atomically).
    options : diffkit.io.assemble.ReadOptions, optional
    compression : str, optional
    progress : callable, optional
        Called with the number of frames written so far after each chunk.

    Returns
    -------
    str
        ``out_path``.
    """
    from .assemble import RunAssembler

    h5py = _h5py()
    asm = RunAssembler(paths, options)
    with atomic_path(out_path) as tmp:
        with h5py.File(tmp, "w", rdcc_nbytes=0) as h5:  # no chunk cache (_RunWriter)
            writer = None
            for times, cells, pos, vel in asm.chunks():
                if writer is None:
                    from ..trajectory import _atomic_masses

                    writer = _RunWriter(h5, list(asm.species), _atomic_masses(asm.species),
                                        asm.has_velocities, compression)
                if writer.vel is not None and vel is None:
                    raise InputError(f"{asm.paths[-1]}: velocities stop part-way through the run")
                writer.append(times, cells, pos, vel)
                if progress is not None:
                    progress(writer.n_frames + writer._buffered)
            writer.close()
            _write_root_attrs(h5, asm.temperature_K, asm.frame_interval_ps, asm.provenance())
    return os.fspath(out_path)


def open_run(path):
    """Open a run file as a :class:`~diffkit.Trajectory` whose positions load lazily.

    The file stays open for as long as the trajectory is used.
    """
    from ..trajectory import Trajectory

    h5py = _h5py()
    name = os.fspath(path)
    try:
        h5 = h5py.File(name, "r")
    except FileNotFoundError as exc:
        raise InputError(f"{name}: no such run file") from exc
    except OSError as exc:
        raise InputError(f"{name}: not an HDF5 run file ({exc})") from exc
    try:
        if h5.attrs.get("diffkit_file") != "run":
            raise InputError(f"{name}: not a diffkit run file (no diffkit_file='run' attribute); "
                             "make one with `diffkit ingest`")
        version = int(h5.attrs.get("layout_version", -1))
        if version > LAYOUT_VERSION:
            raise InputError(f"{name}: run-file layout {version} is newer than this diffkit "
                             f"understands ({LAYOUT_VERSION}); update diffkit")
        T = float(h5.attrs["temperature_K"])
        dt = float(h5.attrs["frame_interval_ps"])
        species = [s.decode() if isinstance(s, bytes) else str(s) for s in h5["atoms/species"][()]]
        com = {k: h5["centre_of_mass"][k][()] for k in h5["centre_of_mass"]}
        traj = Trajectory(species, h5["frames/times"][()], h5["frames/cells"][()],
                          h5["frames/positions"],
                          velocities=h5["frames/velocities"] if "velocities" in h5["frames"] else None,
                          masses=h5["atoms/masses"][()],
                          temperature_K=None if np.isnan(T) else T,
                          frame_interval_ps=None if np.isnan(dt) else dt,
                          provenance=json.loads(h5.attrs.get("provenance", "{}")),
                          com_tracks=com)
    except KeyError as exc:
        h5.close()
        raise InputError(f"{name}: run file lacks {exc}; it may be damaged or half-written") from exc
    except BaseException:
        h5.close()
        raise
    traj._store_handle = h5  # keeps the file open while the trajectory lives
    traj.provenance.setdefault("run_file", os.path.abspath(name))
    return traj


def write_result(path, name, result):
    """Store a result (anything with ``to_dict()``, or a dict) under ``/results/<name>``.

    This edits the run file in place; to keep a run file whole even if stopped
    half-way, write results to a copy and rename it (as campaigns do).
    """
    h5py = _h5py()
    data = result.to_dict() if hasattr(result, "to_dict") else dict(result)
    with h5py.File(os.fspath(path), "r+") as h5:
        g = h5.require_group("results")
        if name in g:
            del g[name]
        d = g.create_group(name)
        d.attrs["json"] = json.dumps(data, default=_json_default)


def read_results(path):
    """All results stored in a run file, as ``{name: dict}``."""
    h5py = _h5py()
    with h5py.File(os.fspath(path), "r") as h5:
        if "results" not in h5:
            return {}
        return {k: json.loads(v.attrs["json"]) for k, v in h5["results"].items()}


def _json_default(obj):
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, np.generic):
        return obj.item()
    return str(obj)
