"""Trajectory object and HDF5 run file."""

import os

import h5py
import numpy as np
import pytest
from ase.data import atomic_masses, atomic_numbers

import diffkit
from diffkit.errors import InputError, UsageError
from diffkit.io.store import read_results, save_trajectory, write_result


def _toy(n_frames=60, seed=0, velocities=False):
    rng = np.random.default_rng(seed)
    species = ["Li"] * 6 + ["P"] * 2 + ["S"] * 8
    pos = np.cumsum(rng.normal(0, 0.1, (n_frames, len(species), 3)), axis=0) + 3.0
    cells = np.broadcast_to(np.diag([10.0, 10.0, 10.0]), (n_frames, 3, 3))
    vel = rng.normal(0, 1, pos.shape) if velocities else None
    return diffkit.Trajectory(species, np.arange(n_frames) * 0.02, cells, pos, velocities=vel,
                              temperature_K=900.0, provenance={"made_by": "test"})


def test_masses_from_ase_table():
    t = _toy()
    # reference: ase.data.atomic_masses (the general-purpose library's table)
    for s in ("Li", "P", "S"):
        np.testing.assert_array_equal(t.masses[t.indices(s)], atomic_masses[atomic_numbers[s]])


def test_indices_error_lists_present_species():
    with pytest.raises(InputError, match="'Na' is not in this trajectory; present: Li, P, S"):
        _toy().indices("Na")


def test_uneven_times_rejected():
    t = _toy()
    times = t.times_ps.copy()
    times[10] += 0.005
    with pytest.raises(InputError, match="frame 10"):
        diffkit.Trajectory(t.species, times, t.cells, t.positions)


def test_iter_atom_blocks_cover_all_atoms():
    t = _toy()
    seen = []
    for idx, block in t.iter_atom_blocks(block_size=5):
        np.testing.assert_array_equal(block, t.positions[:, idx])
        seen.extend(idx)
    assert seen == list(range(t.n_atoms))
    with pytest.raises(UsageError):
        next(t.iter_atom_blocks(block_size=0))


def test_reference_tracks_are_mass_weighted_centres():
    t = _toy()
    ref, track = t.reference_track("framework", "Li")
    fw = np.flatnonzero(t.species != "Li")
    m = t.masses[fw]
    expect = np.einsum("a,fax->fx", m, t.positions[:, fw]) / m.sum()
    np.testing.assert_allclose(track, expect - expect[0], atol=1e-12)
    assert ref == "framework" and t.default_reference("Li") == "framework"
    assert t.reference_track("none", "Li")[1].sum() == 0
    with pytest.raises(UsageError, match="reference must be one of"):
        t.reference_track("lattice", "Li")


def test_run_file_round_trip_is_equal_and_lazy(tmp_path):
    t = _toy(velocities=True)
    path = tmp_path / "run.h5"
    t.save(path)
    back = diffkit.open_run(path)
    assert back.is_lazy and back == t
    assert back.frame_interval_ps == pytest.approx(0.02)
    assert back.provenance["made_by"] == "test"
    for s in t.symbols:
        np.testing.assert_allclose(back.com_tracks[s], t.com_tracks[s], atol=1e-12)
    blocks = [b for _, b in back.iter_atom_blocks(t.indices("S"), block_size=3)]
    np.testing.assert_array_equal(np.concatenate(blocks, axis=1), t.positions[:, t.indices("S")])
    with h5py.File(path) as h5:
        assert h5["frames/positions"].attrs["unit"] == "Å"
        assert h5["frames/times"].attrs["unit"] == "ps"
        assert h5["frames/velocities"].attrs["unit"] == "Å/ps"
        assert h5["atoms/masses"].attrs["unit"] == "amu"
        assert h5.attrs["diffkit_version"] == diffkit.__version__


def test_window_of_lazy_trajectory(tmp_path):
    t = _toy()
    t.save(tmp_path / "run.h5")
    back = diffkit.open_run(tmp_path / "run.h5")
    w = back.window(start_ps=0.2)
    np.testing.assert_array_equal(w.positions, t.positions[10:])
    assert w.n_frames == t.n_frames - 10


def test_save_is_atomic(tmp_path, monkeypatch):
    path = tmp_path / "run.h5"
    path.write_bytes(b"old content")
    t = _toy()

    def boom(*a, **k):
        raise RuntimeError("disk full")

    monkeypatch.setattr("diffkit.io.store._write_root_attrs", boom)
    with pytest.raises(RuntimeError):
        save_trajectory(t, path)
    assert path.read_bytes() == b"old content"
    assert os.listdir(tmp_path) == ["run.h5"]  # no temporary left behind


def test_results_round_trip(tmp_path):
    path = tmp_path / "run.h5"
    _toy().save(path)
    write_result(path, "diffusion", {"D_cm2_per_s": 1.5e-6, "window_ps": np.array([1.0, 2.0])})
    assert read_results(path) == {"diffusion": {"D_cm2_per_s": 1.5e-6, "window_ps": [1.0, 2.0]}}


def test_open_run_refuses_other_files(tmp_path):
    p = tmp_path / "other.h5"
    with h5py.File(p, "w") as h5:
        h5["x"] = 1
    with pytest.raises(InputError, match="other.h5: not a diffkit run file"):
        diffkit.open_run(p)
    q = tmp_path / "text.h5"
    q.write_text("hello")
    with pytest.raises(InputError, match="text.h5: not an HDF5 run file"):
        diffkit.open_run(q)
