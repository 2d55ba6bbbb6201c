"""Trajectory writers: files that ASE and diffkit's readers read back to the input.

Reference: ASE's independent parsers (``ase.io.read``; formats "vasp-xdatcar",
"lammps-dump-text", "extxyz") read every written file, and must give back the
input positions within the printed precision (1e-6 Å here), modulo whole lattice
vectors where the writer wraps. Round trips through diffkit's own readers are
checked too.
"""

from __future__ import annotations

import os

import ase.io
import ase.units
import numpy as np
import pytest

from _files import CUBIC, SPECIES, TRICLINIC, fractional, max_diff_modulo_cell, random_walk
from diffkit.errors import UsageError
from diffkit.io import read_raw
from diffkit.io import write as writers
from diffkit.io.write import LAMMPS_KINDS, write_extxyz, write_lammps_dump, write_xdatcar

TOL = 1e-6  # Å


def in_cell(positions, cells):
    f = fractional(positions, cells)
    return bool(np.all(f > -1e-9) and np.all(f < 1 + 1e-9))


@pytest.mark.parametrize("breathing", [0.0, 0.04], ids=["constant-cell", "variable-cell"])
@pytest.mark.parametrize("coordinates", ["direct", "cartesian"])
def test_xdatcar_round_trip(tmp_path, breathing, coordinates):
    cells, pos, _ = random_walk(n_frames=5, breathing=breathing, seed=30, step=1.5)
    path = tmp_path / "XDATCAR"
    write_xdatcar(path, SPECIES, cells, pos, coordinates=coordinates)
    raw = read_raw(path)
    np.testing.assert_allclose(raw.cells, cells, atol=1e-9)
    assert raw.species == SPECIES
    assert max_diff_modulo_cell(raw.positions, pos, cells) < TOL
    assert in_cell(raw.positions, cells)  # the writer wraps
    if coordinates == "direct":  # ASE reads fractional XDATCAR blocks only
        ref = ase.io.read(path, index=":", format="vasp-xdatcar")
        assert max_diff_modulo_cell([a.positions for a in ref], pos, cells) < TOL
        np.testing.assert_allclose([a.cell[:] for a in ref], cells, atol=1e-9)


def test_xdatcar_layouts(tmp_path):
    cells, pos, _ = random_walk(n_frames=3, breathing=0.02, seed=31)
    path = tmp_path / "XDATCAR"
    with pytest.raises(UsageError, match="constant_cell"):
        write_xdatcar(path, SPECIES, cells, pos, constant_cell=True)
    assert not path.exists()
    write_xdatcar(path, SPECIES, cells[0], pos, constant_cell=False)  # forced variable layout
    text = path.read_text()
    assert text.count("diffkit trajectory") == 3
    # species runs keep the atom order: Li Li Li P S S Li S -> "Li P S Li S" / "3 1 2 1 1"
    header = text.splitlines()
    assert header[5].split() == ["Li", "P", "S", "Li", "S"]
    assert header[6].split() == ["3", "1", "2", "1", "1"]
    assert all(len(line) == 36 for line in header[8:16])  # fixed-width 3 x %12.8f


@pytest.mark.parametrize("kind", sorted(LAMMPS_KINDS))
@pytest.mark.parametrize("cell", [CUBIC, TRICLINIC], ids=["orthogonal", "triclinic"])
def test_lammps_round_trip(tmp_path, kind, cell):
    cells, pos, vel = random_walk(n_frames=4, cell=cell, seed=32, step=1.5)
    path = tmp_path / "run.lammpstrj"
    steps = np.array([0, 100, 200, 300])
    write_lammps_dump(path, SPECIES, cells, pos, steps=steps, kind=kind, velocities=vel,
                      shuffle_seed=5)
    raw = read_raw(path, units="metal")
    assert raw.species == SPECIES
    np.testing.assert_array_equal(raw.steps, steps)
    np.testing.assert_allclose(raw.cells, cells, atol=1e-9)
    np.testing.assert_allclose(raw.velocities, vel, atol=1e-7)
    if raw.kind == "unwrapped":
        np.testing.assert_allclose(raw.positions, pos, atol=TOL)
    else:
        assert in_cell(raw.positions, cells)
        assert max_diff_modulo_cell(raw.positions, pos, cells) < TOL
    if kind.endswith("+images"):
        unwrapped = raw.positions + np.einsum("fni,fij->fnj", raw.images, cells)
        np.testing.assert_allclose(unwrapped, pos, atol=TOL)
    # ASE as the reference reader (it sorts by id; it may wrap, so compare modulo the cell)
    ref = ase.io.read(path, index=":", format="lammps-dump-text")
    assert max_diff_modulo_cell([a.positions for a in ref], pos, cells) < TOL
    ref_vel = np.array([a.get_velocities() for a in ref]) * 1000 * ase.units.fs
    np.testing.assert_allclose(ref_vel, vel, atol=1e-6)


def test_lammps_shuffle_changes_line_order_only(tmp_path):
    cells, pos, _ = random_walk(n_frames=2, seed=33)
    a, b = tmp_path / "a.dump", tmp_path / "b.dump"
    write_lammps_dump(a, SPECIES, cells, pos, steps=[0, 1])
    write_lammps_dump(b, SPECIES, cells, pos, steps=[0, 1], shuffle_seed=1)
    la, lb = a.read_text().splitlines(), b.read_text().splitlines()
    assert la != lb and sorted(la) == sorted(lb)


def test_lammps_rejects_unorientable_cell(tmp_path):
    cells, pos, _ = random_walk(n_frames=2, seed=34)
    rotated = TRICLINIC.T  # upper-triangular: b has a z component before c
    with pytest.raises(UsageError, match="lower-triangular"):
        write_lammps_dump(tmp_path / "x.dump", SPECIES, rotated, pos, steps=[0, 1])
    with pytest.raises(UsageError, match="kind"):
        write_lammps_dump(tmp_path / "x.dump", SPECIES, cells, pos, steps=[0, 1], kind="odd")


@pytest.mark.parametrize("unwrapped", [False, True])
def test_extxyz_round_trip(tmp_path, unwrapped):
    cells, pos, vel = random_walk(n_frames=4, breathing=0.03, seed=35, step=1.5)
    times = np.arange(4) * 0.05
    path = tmp_path / "run.extxyz"
    write_extxyz(path, SPECIES, cells, pos, times_ps=times, velocities=vel, unwrapped=unwrapped,
                 steps=[10, 20, 30, 40])
    raw = read_raw(path)
    assert raw.kind == ("unwrapped" if unwrapped else "wrapped")
    np.testing.assert_allclose(raw.times_ps, times, atol=1e-12)
    np.testing.assert_array_equal(raw.steps, [10, 20, 30, 40])
    np.testing.assert_allclose(raw.velocities, vel, atol=1e-7)
    ref = ase.io.read(path, index=":", format="extxyz")  # ASE as the reference reader
    ref_pos = np.array([a.positions for a in ref])
    np.testing.assert_allclose(raw.positions, ref_pos, atol=TOL)
    if unwrapped:
        np.testing.assert_allclose(raw.positions, pos, atol=TOL)
    else:
        assert in_cell(raw.positions, cells)
        assert max_diff_modulo_cell(ref_pos, pos, cells) < TOL


MAGIC = {".gz": b"\x1f\x8b", ".bz2": b"BZh", ".xz": b"\xfd7zXZ\x00"}


@pytest.mark.parametrize("ext", sorted(MAGIC))
def test_compressed_output(tmp_path, ext):
    cells, pos, vel = random_walk(n_frames=3, seed=36)
    files = {
        "xdatcar": (tmp_path / f"XDATCAR{ext}",
                    lambda p: write_xdatcar(p, SPECIES, cells, pos)),
        "lammpsdump": (tmp_path / f"run.lammpstrj{ext}",
                       lambda p: write_lammps_dump(p, SPECIES, cells, pos, steps=[0, 1, 2])),
        "extxyz": (tmp_path / f"run.extxyz{ext}",
                   lambda p: write_extxyz(p, SPECIES, cells, pos, unwrapped=True)),
    }
    for fmt, (path, write) in files.items():
        write(path)
        assert path.read_bytes().startswith(MAGIC[ext]), fmt
        raw = read_raw(path, units="metal")
        assert max_diff_modulo_cell(raw.positions, pos, cells) < TOL, fmt


def test_failed_write_leaves_target_untouched(tmp_path, monkeypatch):
    cells, pos, _ = random_walk(n_frames=3, seed=37)
    path = tmp_path / "run.extxyz"
    path.write_text("old content\n")

    def broken(f, texts):
        raise OSError("disk full")

    monkeypatch.setattr(writers, "_write_frames", broken)
    with pytest.raises(OSError, match="disk full"):
        write_extxyz(path, SPECIES, cells, pos)
    assert path.read_text() == "old content\n"
    assert os.listdir(tmp_path) == ["run.extxyz"]  # no temporary file left behind


def test_writer_argument_checks(tmp_path):
    cells, pos, vel = random_walk(n_frames=2, seed=38)
    with pytest.raises(UsageError, match="species"):
        write_extxyz(tmp_path / "a.xyz", SPECIES[:-1], cells, pos)
    with pytest.raises(UsageError, match="velocities"):
        write_extxyz(tmp_path / "a.xyz", SPECIES, cells, pos, velocities=vel[:1])
    bad = pos.copy()
    bad[1, 2, 0] = np.nan
    with pytest.raises(UsageError, match="finite"):
        write_xdatcar(tmp_path / "XDATCAR", SPECIES, cells, bad)
    with pytest.raises(UsageError, match="steps"):
        write_lammps_dump(tmp_path / "a.dump", SPECIES, cells, pos, steps=[0])
