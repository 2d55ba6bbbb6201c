"""Small trajectories and comparisons shared by the reader and writer tests."""

from __future__ import annotations

import numpy as np

SPECIES = ("Li", "Li", "Li", "P", "S", "S", "Li", "S")  # Li twice in separate runs on purpose

CUBIC = np.diag([8.0, 8.5, 9.0])
# a lower-triangular (LAMMPS-orientable) skewed cell with tilts of both signs
TRICLINIC = np.array([[8.0, 0.0, 0.0], [1.5, 9.0, 0.0], [-0.7, -0.4, 10.0]])


def random_walk(n_frames=6, species=SPECIES, cell=TRICLINIC, seed=0, step=0.4,
                breathing=0.0):
    """A continuous random walk that leaves the cell, and its cells.

    Returns
    -------
    cells : (n_frames, 3, 3) float, Å
        ``cell`` scaled by 1 + breathing * sin(frame) (constant when breathing is 0).
    positions : (n_frames, n_atoms, 3) float, Å, unwrapped
    velocities : (n_frames, n_atoms, 3) float, Å/ps
    """
    rng = np.random.default_rng(seed)
    n = len(species)
    start = rng.random((n, 3)) @ cell
    steps = rng.normal(scale=step, size=(n_frames, n, 3))
    steps[0] = 0.0
    positions = start + np.cumsum(steps, axis=0)
    scale = 1.0 + breathing * np.sin(np.arange(n_frames))
    cells = cell[None, :, :] * scale[:, None, None]
    velocities = rng.normal(scale=5.0, size=(n_frames, n, 3))
    return cells, positions, velocities


def max_diff_modulo_cell(a, b, cells):
    """Largest |a - b| in Å after removing whole lattice vectors (per frame's cell).

    Parameters
    ----------
    a, b : (n_frames, n_atoms, 3) float, Å
    cells : (n_frames, 3, 3) or (3, 3) float, Å
    """
    a, b = np.asarray(a, float), np.asarray(b, float)
    cells = np.broadcast_to(np.asarray(cells, float), (len(a), 3, 3))
    frac = np.einsum("fnj,fji->fni", a - b, np.linalg.inv(cells))
    frac -= np.round(frac)
    return float(np.abs(np.einsum("fni,fij->fnj", frac, cells)).max())


def fractional(positions, cells):
    """Fractional coordinates of (F, N, 3) positions in (F, 3, 3) cells."""
    cells = np.broadcast_to(np.asarray(cells, float), (len(positions), 3, 3))
    return np.einsum("fnj,fji->fni", positions, np.linalg.inv(cells))
