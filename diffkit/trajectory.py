"""The :class:`Trajectory`: what every analysis stage reads.

Positions are unwrapped, Cartesian, in Å and **raw** (no drift removed); cells
are per frame with rows as lattice vectors; times are in ps. Positions may live
in memory or be read lazily from an HDF5 run file; analysis code reads them in
blocks of atoms across all frames through :meth:`Trajectory.iter_atom_blocks`.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError, UsageError

__all__ = ["Trajectory", "REFERENCES"]

#: Accepted values of the drift ``reference=`` option (see docs/methods.md).
REFERENCES = ("framework", "all", "none")

_DEFAULT_BUDGET_MB = 256.0


def _atomic_masses(species):
    from ase.data import atomic_masses, atomic_numbers

    out = np.empty(len(species))
    for i, s in enumerate(species):
        if s not in atomic_numbers:
            raise InputError(
                f"unknown element symbol {s!r} for atom {i}; give masses= explicitly "
                "or map atom types to element symbols (type_map)"
            )
        out[i] = atomic_masses[atomic_numbers[s]]
    return out


class _FrameWindow:
    """A frame slice of a lazily read (n_frames, n_atoms, 3) dataset."""

    def __init__(self, source, start, stop):
        self._source, self._start, self._stop = source, start, stop
        self.shape = (stop - start,) + tuple(source.shape[1:])
        self.dtype = source.dtype

    def __getitem__(self, key):
        if not isinstance(key, tuple):
            key = (key,)
        f = key[0]
        if isinstance(f, slice):
            a, b, step = f.indices(self.shape[0])
            f = slice(self._start + a, self._start + b, step)
        else:
            f = np.asarray(f) + self._start
        return self._source[(f,) + key[1:]]

    def __array__(self, dtype=None, copy=None):
        arr = np.asarray(self[:, :, :])
        return arr if dtype is None else arr.astype(dtype)


class Trajectory:
    """An unwrapped MD trajectory with its cells, times and metadata.

    Parameters
    ----------
    species : sequence of str, length n_atoms
        Element symbol of each atom.
    times_ps : (n_frames,) float, ps
        Time of each saved frame; must be evenly spaced.
    cells : (n_frames, 3, 3) or (3, 3) float, Å
        Cell per frame, rows are lattice vectors. A single cell is repeated.
    positions : (n_frames, n_atoms, 3) float, Å, or a lazily sliced dataset
        Unwrapped Cartesian positions, no drift removed.
    velocities : (n_frames, n_atoms, 3) float, Å/ps, optional
    masses : (n_atoms,) float, amu, optional
        Defaults to ``ase.data.atomic_masses`` of each symbol.
    temperature_K : float, optional
        Nominal (thermostat) temperature of the run.
    frame_interval_ps : float, optional
        Time between saved frames; checked against ``times_ps``.
    provenance : dict, optional
        Where the data came from (files, hashes, options).
    com_tracks : dict of str to (n_frames, 3) float, Å, optional
        Mass-weighted centre-of-mass track of each species, computed if absent.
    """

    def __init__(self, species, times_ps, cells, positions, *, velocities=None, masses=None,
                 temperature_K=None, frame_interval_ps=None, provenance=None, com_tracks=None):
        self.species = np.asarray([str(s) for s in species], dtype=object)
        n_atoms = len(self.species)
        self.times_ps = np.asarray(times_ps, dtype=float).reshape(-1)
        n_frames = len(self.times_ps)
        if not hasattr(positions, "shape"):
            positions = np.asarray(positions, dtype=float)
        if tuple(positions.shape) != (n_frames, n_atoms, 3):
            raise InputError(
                f"positions have shape {tuple(positions.shape)}, expected "
                f"({n_frames}, {n_atoms}, 3) for {n_frames} frames and {n_atoms} atoms"
            )
        self._positions = positions
        cells = np.asarray(cells, dtype=float)
        if cells.shape == (3, 3):
            cells = np.broadcast_to(cells, (n_frames, 3, 3))
        if cells.shape != (n_frames, 3, 3):
            raise InputError(f"cells have shape {cells.shape}, expected ({n_frames}, 3, 3)")
        self.cells = cells
        if velocities is not None and tuple(velocities.shape) != (n_frames, n_atoms, 3):
            raise InputError(f"velocities have shape {tuple(velocities.shape)}, "
                             f"expected ({n_frames}, {n_atoms}, 3)")
        self._velocities = velocities
        self.masses = (_atomic_masses(self.species) if masses is None
                       else np.asarray(masses, dtype=float).reshape(n_atoms))
        self.temperature_K = None if temperature_K is None else float(temperature_K)
        if self.temperature_K is not None and not self.temperature_K > 0:
            raise InputError(f"temperature must be positive, got {temperature_K} K")
        self.frame_interval_ps = self._check_times(frame_interval_ps)
        self.provenance = dict(provenance or {})
        self._com = None if com_tracks is None else {
            k: np.asarray(v, dtype=float) for k, v in com_tracks.items()}

    # -- construction helpers -------------------------------------------------
    def _check_times(self, frame_interval_ps):
        t = self.times_ps
        if len(t) >= 2:
            dt = np.diff(t)
            step = float(np.median(dt))
            if not step > 0 or np.any(dt <= 0):
                bad = int(np.argmax(dt <= 0)) + 1
                raise InputError(f"times must increase; frame {bad} has time {t[bad]} ps "
                                 f"after {t[bad - 1]} ps")
            off = np.flatnonzero(np.abs(dt - step) > 1e-6 * step + 1e-9)
            if off.size:
                bad = int(off[0]) + 1
                raise InputError(
                    f"frames must be evenly spaced in time; frame {bad} is "
                    f"{dt[bad - 1]:.6g} ps after the previous one, expected {step:.6g} ps")
            if frame_interval_ps is not None and abs(frame_interval_ps - step) > 1e-6 * step:
                raise InputError(f"frame interval {frame_interval_ps} ps disagrees with the "
                                 f"spacing of the times, {step} ps")
            return step
        if frame_interval_ps is not None:
            if not frame_interval_ps > 0:
                raise InputError(f"frame interval must be positive, got {frame_interval_ps} ps")
            return float(frame_interval_ps)
        return None

    @classmethod
    def from_ase(cls, images, *, frame_interval_ps, temperature_K=None, provenance=None,
                 max_step_fraction=None):
        """Build a trajectory from a list of ``ase.Atoms`` (wrapped or not).

        Positions are unwrapped frame to frame with the constant-pressure-safe
        scheme of :mod:`diffkit.unwrap`.

        Parameters
        ----------
        images : sequence of ase.Atoms
        frame_interval_ps : float, ps
            Time between consecutive images.
        temperature_K : float, optional, K
        """
        from .unwrap import Unwrapper

        images = list(images)
        if not images:
            raise InputError("from_ase: no images given")
        if frame_interval_ps is None or not frame_interval_ps > 0:
            raise InputError(f"from_ase: frame_interval_ps must be positive, got {frame_interval_ps}")
        species = images[0].get_chemical_symbols()
        for i, a in enumerate(images):
            if a.get_chemical_symbols() != species:
                raise InputError(f"from_ase: image {i} has different atoms than image 0 "
                                 f"({len(a)} atoms, expected {len(species)})")
        cells = np.array([a.cell.array for a in images], dtype=float)
        pos = np.array([a.positions for a in images], dtype=float)
        kw = {} if max_step_fraction is None else {"max_step_fraction": max_step_fraction}
        unwrapped = Unwrapper(**kw).feed(pos, cells, "wrapped", source="ase images")
        return cls(species, np.arange(len(images)) * float(frame_interval_ps), cells, unwrapped,
                   masses=images[0].get_masses(), temperature_K=temperature_K,
                   frame_interval_ps=frame_interval_ps,
                   provenance=provenance or {"reader": "Trajectory.from_ase"})

    # -- basic facts -------------------------------------------------------------
    @property
    def n_frames(self):
        """Number of saved frames."""
        return len(self.times_ps)

    @property
    def n_atoms(self):
        """Number of atoms."""
        return len(self.species)

    @property
    def duration_ps(self):
        """Time between the first and last frame, ps."""
        return float(self.times_ps[-1] - self.times_ps[0]) if self.n_frames else 0.0

    @property
    def symbols(self):
        """Distinct element symbols, in order of first appearance."""
        seen = []
        for s in self.species:
            if s not in seen:
                seen.append(s)
        return tuple(seen)

    @property
    def is_lazy(self):
        """True when positions are read from a run file on demand."""
        return not isinstance(self._positions, np.ndarray)

    @property
    def positions(self):
        """(n_frames, n_atoms, 3) float, Å: unwrapped positions (loaded if lazy)."""
        if self.is_lazy:
            return np.asarray(self._positions[:, :, :], dtype=float)
        return self._positions

    @property
    def velocities(self):
        """(n_frames, n_atoms, 3) float, Å/ps, or None where the file had none."""
        if self._velocities is None:
            return None
        return np.asarray(self._velocities[:, :, :], dtype=float)

    @property
    def has_velocities(self):
        """True when the trajectory carries velocities."""
        return self._velocities is not None

    @property
    def volumes_A3(self):
        """(n_frames,) float, Å³: cell volume per frame."""
        return np.abs(np.linalg.det(self.cells))

    @property
    def mean_volume_A3(self):
        """Mean cell volume over the run, Å³."""
        return float(np.mean(self.volumes_A3))

    def indices(self, symbol):
        """Indices of the atoms of element ``symbol`` (sorted).

        Raises
        ------
        InputError
            If no atom of that element is present; the message lists those that are.
        """
        idx = np.flatnonzero(self.species == str(symbol))
        if idx.size == 0:
            raise InputError(f"species {symbol!r} is not in this trajectory; "
                             f"present: {', '.join(self.symbols)}")
        return idx

    def count(self, symbol):
        """Number of atoms of element ``symbol``."""
        return int(len(self.indices(symbol)))

    # -- streaming ------------------------------------------------------------
    def block_size_for(self, memory_budget_MB=_DEFAULT_BUDGET_MB, copies=8):
        """Atoms per block so that ``copies`` float64 arrays of one block fit the budget."""
        per_atom = max(self.n_frames, 1) * 3 * 8 * copies
        return max(1, int(memory_budget_MB * 2**20 // per_atom))

    def iter_atom_blocks(self, atoms=None, *, block_size=None, memory_budget_MB=_DEFAULT_BUDGET_MB):
        """Yield blocks of atoms across all frames.

        Parameters
        ----------
        atoms : array of int or str, optional
            Atom indices, or an element symbol; all atoms by default.
        block_size : int, optional
            Atoms per block; by default sized from ``memory_budget_MB``.
        memory_budget_MB : float
            Memory the caller may spend on one block and its working copies.

        Yields
        ------
        indices : (k,) int
            Atom indices of the block.
        positions : (n_frames, k, 3) float, Å
            Their unwrapped positions (may be a read-only view: do not modify).
        """
        if atoms is None:
            atoms = np.arange(self.n_atoms)
        elif isinstance(atoms, str):
            atoms = self.indices(atoms)
        atoms = np.asarray(atoms, dtype=int)
        if block_size is None:
            block_size = self.block_size_for(memory_budget_MB)
        if block_size < 1:
            raise UsageError(f"block_size must be at least 1, got {block_size}")
        for start in range(0, len(atoms), block_size):
            idx = atoms[start:start + block_size]
            yield idx, self._read_atoms(self._positions, idx)

    @staticmethod
    def _read_atoms(source, idx):
        lo, hi = int(idx.min()), int(idx.max()) + 1
        contiguous = hi - lo == len(idx) and bool(np.all(np.diff(idx) == 1))
        if isinstance(source, np.ndarray):
            if contiguous and source.dtype == np.float64:
                return source[:, lo:hi, :]  # a view: no copy (callers do not write into it)
            return np.asarray(source[:, idx, :], dtype=float)
        if contiguous:
            return np.asarray(source[:, lo:hi, :], dtype=float)
        if hi - lo <= 4 * len(idx):  # read the span once and pick
            return np.asarray(source[:, lo:hi, :], dtype=float)[:, idx - lo, :]
        return np.concatenate([np.asarray(source[:, i:i + 1, :], dtype=float) for i in idx], axis=1)

    # -- drift references -------------------------------------------------------
    @property
    def com_tracks(self):
        """dict of symbol to (n_frames, 3) float, Å: mass-weighted centre of mass per species."""
        if self._com is None:
            from .unwrap import species_com_tracks

            self._com = species_com_tracks(self, memory_budget_MB=_DEFAULT_BUDGET_MB)
        return self._com

    def species_mass(self, symbol):
        """Total mass of the atoms of ``symbol``, amu."""
        return float(self.masses[self.indices(symbol)].sum())

    def default_reference(self, mobile):
        """``"framework"`` where species other than ``mobile`` exist, else ``"none"``."""
        mobile = {mobile} if isinstance(mobile, str) else set(mobile)
        return "framework" if any(s not in mobile for s in self.symbols) else "none"

    def reference_track(self, reference, mobile):
        """Drift track to subtract from positions for a given reference.

        Parameters
        ----------
        reference : {"framework", "all", "none"} or None
            None picks :meth:`default_reference`.
        mobile : str or sequence of str
            Mobile species (excluded from the framework).

        Returns
        -------
        reference : str
            The reference actually used.
        track : (n_frames, 3) float, Å
            Mass-weighted centre of mass of the reference atoms, relative to frame 0.
        """
        mobile = {mobile} if isinstance(mobile, str) else set(mobile)
        if reference is None:
            reference = self.default_reference(mobile)
        if reference not in REFERENCES:
            raise UsageError(f"reference must be one of {', '.join(REFERENCES)}; got {reference!r}")
        if reference == "none":
            return reference, np.zeros((self.n_frames, 3))
        members = [s for s in self.symbols if reference == "all" or s not in mobile]
        if not members:
            raise UsageError("reference 'framework' needs at least one species that is not mobile; "
                             f"all species ({', '.join(self.symbols)}) are mobile — use 'all' or 'none'")
        weights = np.array([self.species_mass(s) for s in members])
        track = sum(w * self.com_tracks[s] for w, s in zip(weights, members)) / weights.sum()
        return reference, track - track[:1]

    # -- frames and persistence -------------------------------------------------
    def window(self, start_ps=None, stop_ps=None):
        """A trajectory restricted to ``start_ps <= t - t0 <= stop_ps`` (times relative to frame 0)."""
        rel = self.times_ps - (self.times_ps[0] if self.n_frames else 0.0)
        lo = 0 if start_ps is None else int(np.searchsorted(rel, start_ps - 1e-9))
        hi = self.n_frames if stop_ps is None else int(np.searchsorted(rel, stop_ps + 1e-9, "right"))
        if hi - lo < 1:
            raise InputError(f"no frames between {start_ps} ps and {stop_ps} ps "
                             f"(run is {self.duration_ps:g} ps long)")
        def cut(a):
            if a is None:
                return None
            return a[lo:hi] if isinstance(a, np.ndarray) else _FrameWindow(a, lo, hi)
        com = None if self._com is None else {k: v[lo:hi] for k, v in self._com.items()}
        prov = dict(self.provenance)
        prov["window_ps"] = [float(rel[lo]), float(rel[hi - 1])]
        return Trajectory(self.species, self.times_ps[lo:hi], self.cells[lo:hi], cut(self._positions),
                          velocities=cut(self._velocities), masses=self.masses,
                          temperature_K=self.temperature_K, frame_interval_ps=self.frame_interval_ps,
                          provenance=prov, com_tracks=com)

    def save(self, path, *, compression=None):
        """Write this trajectory to an HDF5 run file (atomically). See :mod:`diffkit.io.store`."""
        from .io.store import save_trajectory

        return save_trajectory(self, path, compression=compression)

    def __eq__(self, other):
        if not isinstance(other, Trajectory):
            return NotImplemented
        if (self.n_frames, self.n_atoms) != (other.n_frames, other.n_atoms):
            return False
        same = (list(self.species) == list(other.species)
                and np.array_equal(self.times_ps, other.times_ps)
                and np.array_equal(self.cells, other.cells)
                and np.array_equal(self.masses, other.masses)
                and self.temperature_K == other.temperature_K
                and self.has_velocities == other.has_velocities)
        if not same:
            return False
        for (_, a), (_, b) in zip(self.iter_atom_blocks(), other.iter_atom_blocks()):
            if not np.array_equal(a, b):
                return False
        if self.has_velocities and not np.array_equal(self.velocities, other.velocities):
            return False
        return True

    __hash__ = None

    def __repr__(self):
        counts = ", ".join(f"{s}:{int(np.sum(self.species == s))}" for s in self.symbols)
        dt = "?" if self.frame_interval_ps is None else f"{self.frame_interval_ps:g} ps"
        T = "?" if self.temperature_K is None else f"{self.temperature_K:g} K"
        return (f"Trajectory({self.n_frames} frames every {dt}, {self.duration_ps:g} ps, "
                f"atoms {counts}, T={T}{', lazy' if self.is_lazy else ''})")
