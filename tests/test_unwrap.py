"""Unwrapping checks.

The scheme under test: add, frame to frame, the minimum-image displacement
computed in the new frame's cell (von Bülow, Bullerjahn & Hummer, J. Chem.
Phys. 153, 021101 (2020)). The references here are analytic: a path made of
known increments must come back as the sum of those increments.
"""

import numpy as np
import pytest

from diffkit.errors import InputError
from diffkit.unwrap import Unwrapper, cell_heights, minimum_image, wrap_into_cells


def _wrap(pos, cells):
    return wrap_into_cells(pos, cells)


def _skewed_cell(rng, L=10.0):
    cell = np.diag([L, L * 1.1, L * 0.9])
    cell[1, 0] = 0.45 * L  # strongly tilted
    cell[2, 0] = -0.3 * L
    cell[2, 1] = 0.35 * L
    return cell + rng.normal(0, 0.01, (3, 3))


def test_constant_orthorhombic_cell_path_comes_back():
    rng = np.random.default_rng(1)
    n_frames, n_atoms = 400, 12
    cell = np.diag([8.0, 9.0, 10.0])
    path = np.cumsum(rng.normal(0, 0.3, (n_frames, n_atoms, 3)), axis=0) + 4.0
    cells = np.broadcast_to(cell, (n_frames, 3, 3))
    out = Unwrapper().feed(_wrap(path, cells), cells, "wrapped")
    # analytic: the path is known up to one lattice translation of the first frame
    np.testing.assert_allclose(out - out[0], path - path[0], atol=1e-9)
    assert np.abs(path - path[0]).max() > 10  # it did cross the cell many times


def test_changing_triclinic_cell_gives_sum_of_increments():
    rng = np.random.default_rng(2)
    n_frames, n_atoms = 300, 9
    base = _skewed_cell(rng)
    # a breathing, shearing cell as in a constant-pressure run
    scale = 1 + 0.03 * np.sin(np.arange(n_frames) / 17.0)
    cells = base[None] * scale[:, None, None]
    cells[:, 1, 0] += 0.5 * np.sin(np.arange(n_frames) / 11.0)
    increments = rng.normal(0, 0.35, (n_frames, n_atoms, 3))
    increments[0] = 0
    # each new position = previous wrapped position + increment, wrapped into the
    # new frame's cell (the construction of the check in REFERENCES.md, Unwrapping)
    wrapped = np.empty((n_frames, n_atoms, 3))
    wrapped[0] = rng.uniform(0, 1, (n_atoms, 3)) @ cells[0]
    for i in range(1, n_frames):
        wrapped[i] = _wrap((wrapped[i - 1] + increments[i])[None], cells[i:i + 1])[0]
    truth = wrapped[0] + np.cumsum(increments, axis=0)
    out = Unwrapper().feed(wrapped, cells, "wrapped")
    np.testing.assert_allclose(out - out[0], truth - truth[0], atol=1e-6)


def test_chunked_feeding_equals_one_shot():
    rng = np.random.default_rng(3)
    cells = np.broadcast_to(_skewed_cell(rng), (200, 3, 3))
    truth = np.cumsum(rng.normal(0, 0.3, (200, 5, 3)), axis=0)
    wrapped = _wrap(truth, cells)
    whole = Unwrapper().feed(wrapped, cells, "wrapped")
    u = Unwrapper()
    parts = [u.feed(wrapped[a:a + 37], cells[a:a + 37], "wrapped", first_frame=a)
             for a in range(0, 200, 37)]
    np.testing.assert_allclose(np.concatenate(parts), whole, atol=1e-12)


def test_image_flags_and_unwrapped_columns_used_in_constant_cell():
    rng = np.random.default_rng(4)
    cell = np.diag([7.0, 7.0, 7.0])
    cells = np.broadcast_to(cell, (50, 3, 3))
    # steps too large to unwrap by minimum image, but image flags make them exact
    truth = np.cumsum(rng.normal(0, 2.0, (50, 4, 3)), axis=0)
    frac = truth @ np.linalg.inv(cell)
    images = np.floor(frac).astype(int)
    wrapped = (frac - images) @ cell
    out = Unwrapper().feed(wrapped, cells, "wrapped", images=images)
    np.testing.assert_allclose(out, truth, atol=1e-9)
    out2 = Unwrapper().feed(truth, cells, "unwrapped")
    np.testing.assert_allclose(out2, truth, atol=1e-12)


def test_file_unwrapped_columns_in_changing_cell_are_rewrapped():
    # LAMMPS-style xu = x + ix·L(t) in a changing box: taking xu as given puts
    # ix·ΔL into the displacement (von Bülow et al. 2020); the scheme must not.
    rng = np.random.default_rng(5)
    n = 200
    L = 10.0 * (1 + 0.05 * np.sin(np.arange(n) / 9.0))
    cells = np.einsum("f,ij->fij", L, np.eye(3))
    inc = rng.normal(0, 0.2, (n, 6, 3))
    inc[0] = 0
    wrapped = np.empty((n, 6, 3))
    images = np.zeros((n, 6, 3))
    wrapped[0] = rng.uniform(0, L[0], (6, 3))
    for i in range(1, n):
        moved = (wrapped[i - 1] + inc[i]) / L[i]
        images[i] = images[i - 1] + np.floor(moved)
        wrapped[i] = (moved - np.floor(moved)) * L[i]
    truth = wrapped[0] + np.cumsum(inc, axis=0)
    file_xu = wrapped + images * L[:, None, None]  # what such a dump would hold
    assert np.abs(images).max() >= 1
    out = Unwrapper().feed(file_xu, cells, "unwrapped")
    np.testing.assert_allclose(out - out[0], truth - truth[0], atol=1e-6)


def test_too_rare_frames_name_frame_and_atom():
    cell = np.diag([6.0, 6.0, 6.0])
    pos = np.zeros((5, 3, 3)) + 1.0
    pos[3, 2] += [2.7, 0, 0]  # 0.45 of the cell height in one step
    with pytest.raises(InputError, match=r"run\.xyz: frame 13, atom 2 .*too rarely"):
        Unwrapper().feed(pos, np.broadcast_to(cell, (5, 3, 3)), "wrapped", source="run.xyz",
                         first_frame=10)


def test_minimum_image_is_shortest_in_skewed_cell():
    rng = np.random.default_rng(6)
    cell = _skewed_cell(rng)
    d = rng.uniform(-15, 15, (500, 3))
    mi = minimum_image(d, cell)
    # brute force over a wide range of images (the definition)
    n = np.array([(i, j, k) for i in range(-4, 5) for j in range(-4, 5) for k in range(-4, 5)])
    cands = d[:, None, :] + (n @ cell)[None]
    best = np.linalg.norm(cands, axis=-1).min(axis=1)
    np.testing.assert_allclose(np.linalg.norm(mi, axis=-1), best, rtol=1e-12)
    # and it differs from d by a lattice vector
    frac = (mi - d) @ np.linalg.inv(cell)
    np.testing.assert_allclose(frac, np.round(frac), atol=1e-9)


def test_cell_heights_of_a_cube_and_a_slab():
    np.testing.assert_allclose(cell_heights(np.diag([3.0, 4.0, 5.0])), [3, 4, 5])
    hexa = np.array([[4.0, 0, 0], [-2.0, 2 * np.sqrt(3), 0], [0, 0, 6.0]])
    # the height of a hexagonal cell across a is a·sin(60°) (geometry)
    np.testing.assert_allclose(cell_heights(hexa)[:2], [4 * np.sqrt(3) / 2] * 2)
