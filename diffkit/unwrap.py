"""Periodic unwrapping (constant-pressure safe) and centre-of-mass tracks.

Unwrapping adds, frame to frame, the minimum-image displacement computed in
the cell of the *new* frame (von Bülow, Bullerjahn & Hummer, J. Chem. Phys.
153, 021101 (2020); see docs/methods.md). For skewed cells the neighbouring
images are searched rather than trusting rounded fractional coordinates.
Image flags and already-unwrapped coordinates from a file are used as given
only while the cell is constant.
"""

from __future__ import annotations

import itertools

import numpy as np

from .errors import InputError

__all__ = ["Unwrapper", "minimum_image", "wrap_into_cells", "cell_heights", "species_com_tracks",
           "DEFAULT_MAX_STEP_FRACTION"]

#: Largest displacement between saved frames, as a fraction of the smallest
#: cell height, that can be unwrapped without ambiguity (beyond 0.5 it is
#: impossible; below it a margin keeps fast vibrations safe).
DEFAULT_MAX_STEP_FRACTION = 0.4

_NEIGHBOURS = np.array(list(itertools.product((-1, 0, 1), repeat=3)), dtype=float)  # (27, 3)
_BATCH = 200_000  # displacement vectors per batch in the skewed-cell search


def cell_heights(cells):
    """Distances between opposite faces of each cell.

    Parameters
    ----------
    cells : (..., 3, 3) float, Å
        Rows are lattice vectors.

    Returns
    -------
    (..., 3) float, Å
    """
    cells = np.asarray(cells, dtype=float)
    vol = np.abs(np.linalg.det(cells))
    out = np.empty(cells.shape[:-2] + (3,))
    for j in range(3):
        cross = np.cross(cells[..., (j + 1) % 3, :], cells[..., (j + 2) % 3, :])
        out[..., j] = vol / np.linalg.norm(cross, axis=-1)
    return out


def _is_orthorhombic(cell):
    off = cell - np.diag(np.diag(cell))
    return np.all(np.abs(off) <= 1e-12 * np.abs(cell).max())


def wrap_into_cells(positions, cells):
    """Wrap positions into their frame's cell (fractional coordinates in [0, 1)).

    Parameters
    ----------
    positions : (k, n, 3) float, Å
    cells : (k, 3, 3) float, Å

    Returns
    -------
    (k, n, 3) float, Å
    """
    frac = np.einsum("knx,kxy->kny", positions, np.linalg.inv(cells))
    frac -= np.floor(frac)
    return np.einsum("kny,kyx->knx", frac, cells)


def minimum_image(delta, cell):
    """Shortest periodic image of displacement vectors in one cell.

    Parameters
    ----------
    delta : (..., 3) float, Å
    cell : (3, 3) float, Å, rows are lattice vectors

    Returns
    -------
    (..., 3) float, Å
    """
    delta = np.asarray(delta, dtype=float)
    if _is_orthorhombic(cell):
        L = np.diag(cell)
        return delta - L * np.round(delta / L)
    inv = np.linalg.inv(cell)
    flat = delta.reshape(-1, 3)
    out = np.empty_like(flat)
    for a in range(0, len(flat), _BATCH):
        frac = flat[a:a + _BATCH] @ inv
        frac -= np.round(frac)
        cand = (frac[:, None, :] + _NEIGHBOURS[None]) @ cell  # (m, 27, 3)
        best = np.argmin(np.einsum("mkx,mkx->mk", cand, cand), axis=1)
        out[a:a + _BATCH] = cand[np.arange(len(cand)), best]
    return out.reshape(delta.shape)


class Unwrapper:
    """Turn frames as a file holds them into unwrapped positions, chunk by chunk.

    Feed consecutive chunks (and consecutive files of a restarted run); state
    carries over between calls.

    Parameters
    ----------
    max_step_fraction : float
        Largest unwrapped displacement between saved frames as a fraction of
        the smallest cell height; more is an error (frames saved too rarely).
    """

    def __init__(self, max_step_fraction=DEFAULT_MAX_STEP_FRACTION):
        if not 0 < max_step_fraction <= 0.5:
            raise InputError(f"max_step_fraction must be in (0, 0.5], got {max_step_fraction}")
        self.max_step_fraction = float(max_step_fraction)
        self._last_wrapped = None     # (n, 3) last frame as the file gave it, wrapped
        self._last_given = None       # (n, 3) last file-unwrapped frame (same segment), or None
        self._last_unwrapped = None   # (n, 3) our unwrapped result for the last frame
        self._cell0 = None
        self.constant_cell = True

    def new_segment(self):
        """Mark the start of a new file: file-given unwrapped coordinates restart there."""
        self._last_given = None

    def feed(self, positions, cells, kind, *, images=None, source="<data>", first_frame=1):
        """Unwrap one chunk.

        Parameters
        ----------
        positions : (k, n, 3) float, Å, Cartesian
            As the file holds them.
        cells : (k, 3, 3) float, Å
        kind : {"wrapped", "unwrapped"}
            Whether the file's positions are wrapped into the cell or already unwrapped.
        images : (k, n, 3) int, optional
            Image flags for wrapped positions (LAMMPS ``ix iy iz``).
        source : str
            File name used in error messages.
        first_frame : int
            Number of the chunk's first frame in its file as messages show it
            (diffkit counts frames from 1 in messages).

        Returns
        -------
        (k, n, 3) float, Å
            Unwrapped positions.
        """
        pos = np.asarray(positions, dtype=float)
        cells = np.asarray(cells, dtype=float)
        if kind not in ("wrapped", "unwrapped"):
            raise ValueError(f"kind must be 'wrapped' or 'unwrapped', got {kind!r}")
        k = len(pos)
        if k == 0:
            return pos.copy()
        if self._cell0 is None:
            self._cell0 = cells[0].copy()
        scale = np.abs(self._cell0).max()
        if self.constant_cell and np.any(np.abs(cells - self._cell0) > 1e-9 * scale):
            self.constant_cell = False
            self._last_given = None
        given = None
        if self.constant_cell:
            if kind == "unwrapped":
                given = pos
            elif images is not None:
                given = pos + np.asarray(images, dtype=float) @ self._cell0
        if given is not None:
            if self._last_unwrapped is None:
                out = given.copy()
            elif self._last_given is not None:
                out = self._last_unwrapped + (given - self._last_given)
            else:  # a new file or the first constant-cell chunk: join by minimum image
                step = minimum_image(pos[0] - self._last_wrapped, cells[0])
                self._check_step(step[None], cells[:1], source, first_frame)
                out = self._last_unwrapped + step + (given - given[0])
            self._last_given = given[-1]
        else:
            if kind == "unwrapped" or images is not None:
                pos = wrap_into_cells(pos, cells)  # file-unwrapped coordinates in a changing cell
            prev = np.concatenate([pos[:1] if self._last_wrapped is None
                                   else self._last_wrapped[None], pos[:-1]])
            steps = self._steps(pos - prev, cells)
            self._check_step(steps, cells, source, first_frame)
            start = pos[0] if self._last_unwrapped is None else self._last_unwrapped
            out = start + np.cumsum(steps, axis=0)
            self._last_given = None
        self._last_unwrapped = out[-1].copy()
        self._last_wrapped = pos[-1].copy()  # any periodic image will do for the next step
        return out

    @staticmethod
    def _steps(delta, cells):
        """Minimum-image displacement of each frame in that frame's cell."""
        diag = np.einsum("kii->ki", cells)
        off = cells - np.einsum("ki,ij->kij", diag, np.eye(3))
        if np.all(np.abs(off) <= 1e-12 * np.abs(cells).max()):
            L = diag[:, None, :]
            return delta - L * np.round(delta / L)
        return np.stack([minimum_image(d, c) for d, c in zip(delta, cells)])

    def _check_step(self, steps, cells, source, first_frame):
        """Refuse displacements too large to unwrap without ambiguity."""
        limit = self.max_step_fraction * cell_heights(cells).min(axis=-1)  # (k,)
        dist = np.linalg.norm(steps, axis=-1)  # (k, n)
        over = dist > limit[:, None]
        if over.any():
            f, atom = np.argwhere(over)[0]
            raise InputError(
                f"{source}: frame {first_frame + f}, atom {atom} moved {dist[f, atom]:.3g} Å since "
                f"the previous frame, more than {self.max_step_fraction:g} of the smallest cell "
                f"height ({limit[f]:.3g} Å): frames are saved too rarely to unwrap safely "
                "(save positions more often, or give unwrapped coordinates or image flags)")


def species_com_tracks(traj, memory_budget_MB=256.0):
    """Mass-weighted centre-of-mass track of each species.

    Parameters
    ----------
    traj : Trajectory
    memory_budget_MB : float
        Memory for one block of atoms.

    Returns
    -------
    dict of str to (n_frames, 3) float, Å
    """
    out = {}
    for s in traj.symbols:
        idx = traj.indices(s)
        acc = np.zeros((traj.n_frames, 3))
        for block_idx, block in traj.iter_atom_blocks(idx, memory_budget_MB=memory_budget_MB):
            acc += np.einsum("a,fax->fx", traj.masses[block_idx], block)
        out[s] = acc / traj.masses[idx].sum()
    return out
