"""Trajectory readers: frames as the file holds them, checked against ASE.

Reference: ``ase.io.read(path, index=":")`` of the Atomic Simulation Environment
(ASE), a general-purpose atomistic library with its own independent parsers of
XDATCAR ("vasp-xdatcar"), LAMMPS text dumps ("lammps-dump-text") and extended
XYZ ("extxyz"). The raw frames of each diffkit reader must equal ASE's within
1e-6 Å before any unwrapping.
"""

from __future__ import annotations

import bz2
import gzip
import io
import lzma
import re
import warnings

import ase.io
import ase.units
import numpy as np
import pytest
from ase import Atoms

from _files import CUBIC, SPECIES, TRICLINIC, max_diff_modulo_cell, random_walk
from diffkit.errors import DiffkitWarning, InputError
from diffkit.io import detect_format, read_raw, reader_module
from diffkit.io.write import write_extxyz, write_lammps_dump, write_xdatcar

TOL = 1e-6  # Å


def ase_frames(path, fmt):
    images = ase.io.read(path, index=":", format=fmt)
    return (images, np.array([a.cell[:] for a in images]),
            np.array([a.positions for a in images]))


def read_quiet(path, **kw):
    """read_raw with diffkit warnings silenced (the unit-style warning of LAMMPS dumps)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiffkitWarning)
        return read_raw(path, **kw)


def assert_names(exc, path, frame=None, line=None):
    """The message names the file, and the frame and/or line."""
    msg = str(exc)
    assert str(path) in msg, msg
    if frame is not None:
        assert re.search(rf"\bframe {frame}\b", msg), msg
    if line is not None:
        assert re.search(rf"\bline {line}\b", msg), msg
    assert frame is not None or line is not None


# ------------------------------------------------------------------ against ASE
@pytest.mark.parametrize("breathing", [0.0, 0.03], ids=["constant-cell", "variable-cell"])
def test_xdatcar_frames_equal_ase(tmp_path, breathing):
    cells, pos, _ = random_walk(n_frames=5, breathing=breathing, seed=1)
    path = tmp_path / "run.XDATCAR"
    write_xdatcar(path, SPECIES, cells, pos)
    headers = path.read_text().count("diffkit trajectory")
    assert headers == (1 if breathing == 0 else 5)
    raw = read_raw(path)
    images, ref_cells, ref_pos = ase_frames(path, "vasp-xdatcar")  # ASE is the reference
    assert raw.species == tuple(images[0].get_chemical_symbols()) == SPECIES
    assert raw.kind == "wrapped" and raw.steps is None
    np.testing.assert_allclose(raw.cells, ref_cells, atol=TOL)
    np.testing.assert_allclose(raw.positions, ref_pos, atol=TOL)


@pytest.mark.parametrize("kind", ["unwrapped", "wrapped+images", "scaled", "scaled-unwrapped"])
@pytest.mark.parametrize("cell", [CUBIC, TRICLINIC], ids=["orthogonal", "triclinic"])
def test_lammps_frames_equal_ase(tmp_path, kind, cell):
    cells, pos, vel = random_walk(n_frames=4, cell=cell, seed=2)
    path = tmp_path / "run.lammpstrj"
    write_lammps_dump(path, SPECIES, cells, pos, steps=np.arange(4) * 50, kind=kind,
                      velocities=vel, shuffle_seed=7)
    raw = read_raw(path, units="metal")
    images, ref_cells, ref_pos = ase_frames(path, "lammps-dump-text")  # ASE is the reference
    assert raw.species == tuple(images[0].get_chemical_symbols())
    np.testing.assert_allclose(raw.cells, ref_cells, atol=TOL)
    # ASE may or may not wrap the coordinates it reads (versions differ); both describe the same
    # atoms, so compare modulo whole lattice vectors of each frame's cell.
    assert max_diff_modulo_cell(raw.positions, ref_pos, ref_cells) < TOL
    # ASE holds velocities in its own units (Å per ASE time unit); 1 ps = 1000 * ase.units.fs
    ref_vel = np.array([a.get_velocities() for a in images]) * 1000 * ase.units.fs
    np.testing.assert_allclose(raw.velocities, ref_vel, atol=1e-6)
    np.testing.assert_array_equal(raw.steps, np.arange(4) * 50)


LAMMPS_OFFSET_BOX = """\
ITEM: TIMESTEP
100
ITEM: NUMBER OF ATOMS
3
ITEM: BOX BOUNDS xy xz yz pp pp pp
-3.0 12.0 1.0
-1.5 9.0 -0.5
2.0 12.0 0.5
ITEM: ATOMS type id xs ys zs
2 3 0.5 0.5 0.5
1 1 0.1 0.2 0.3
1 2 0.9 0.8 0.7
"""


def test_lammps_triclinic_bounds_and_origin(tmp_path):
    path = tmp_path / "offset.dump"
    path.write_text(LAMMPS_OFFSET_BOX)
    raw = read_raw(path, type_map={1: "Li", 2: "S"}, units="metal")
    # LAMMPS manual ("Triclinic simulation boxes"): xlo = xlo_bound - min(0, xy, xz, xy+xz)
    # = -3 - (-0.5) = -2.5, xhi = 12 - max(0, 1, -0.5, 0.5) = 11; ylo = -1.5 - min(0, 0.5)
    # = -1.5, yhi = 9 - 0.5 = 8.5; z from 2 to 12. a = (13.5, 0, 0), b = (1, 10, 0),
    # c = (-0.5, 0.5, 10).
    expected_cell = np.array([[13.5, 0, 0], [1.0, 10.0, 0], [-0.5, 0.5, 10.0]])
    np.testing.assert_allclose(raw.cells[0], expected_cell, atol=1e-12)
    origin = np.array([-2.5, -1.5, 2.0])
    frac = np.array([[0.1, 0.2, 0.3], [0.9, 0.8, 0.7], [0.5, 0.5, 0.5]])  # sorted by id
    np.testing.assert_allclose(raw.positions[0], origin + frac @ expected_cell, atol=1e-12)
    assert raw.species == ("Li", "Li", "S")
    # ASE (reference) gives positions relative to the box origin (its "celldisp"); diffkit keeps
    # the LAMMPS frame, so compare after removing the origin.
    ref = ase.io.read(path, format="lammps-dump-text")
    np.testing.assert_allclose(ref.get_celldisp().ravel(), origin, atol=1e-12)
    np.testing.assert_allclose(raw.positions[0] - origin, ref.positions, atol=TOL)
    np.testing.assert_allclose(raw.cells[0], ref.cell[:], atol=TOL)


@pytest.mark.parametrize("with_velocities", [False, True])
def test_extxyz_frames_equal_ase(tmp_path, with_velocities):
    cells, pos, vel = random_walk(n_frames=4, breathing=0.02, seed=3)
    path = tmp_path / "run.extxyz"
    times = np.arange(4) * 0.025
    write_extxyz(path, SPECIES, cells, pos, times_ps=times,
                 velocities=vel if with_velocities else None)
    raw = read_raw(path)
    images, ref_cells, ref_pos = ase_frames(path, "extxyz")  # ASE is the reference
    assert raw.species == tuple(images[0].get_chemical_symbols())
    np.testing.assert_allclose(raw.cells, ref_cells, atol=TOL)
    np.testing.assert_allclose(raw.positions, ref_pos, atol=TOL)
    np.testing.assert_allclose(raw.times_ps, [a.info["time_ps"] for a in images], atol=1e-12)
    if with_velocities:  # written as velo:R:3 in Å/ps; ASE keeps the column as it is
        np.testing.assert_allclose(raw.velocities, [a.arrays["velo"] for a in images], atol=1e-7)
    else:
        assert raw.velocities is None


def test_extxyz_written_by_ase(tmp_path):
    """An extended XYZ file written by ASE itself, with momenta and a time per frame."""
    cells, pos, vel = random_walk(n_frames=3, seed=4)
    frames = []
    for i in range(3):
        a = Atoms(SPECIES, positions=pos[i], cell=cells[i], pbc=True)
        a.set_velocities(vel[i] / (1000 * ase.units.fs))  # Å/ps -> ASE velocity unit
        a.info["time_ps"] = 0.1 * i
        frames.append(a)
    path = tmp_path / "ase.xyz"
    ase.io.write(path, frames, format="extxyz")
    raw = read_raw(path)
    back = ase.io.read(path, index=":")
    np.testing.assert_allclose(raw.positions, [a.positions for a in back], atol=TOL)
    ref_vel = np.array([a.get_velocities() for a in back]) * 1000 * ase.units.fs
    np.testing.assert_allclose(raw.velocities, ref_vel, atol=1e-6)
    np.testing.assert_allclose(raw.velocities, vel, atol=1e-5)  # ASE prints 8 decimals
    np.testing.assert_allclose(raw.times_ps, [0.0, 0.1, 0.2], atol=1e-12)


def test_asefile_reads_ase_trajectory(tmp_path):
    cells, pos, vel = random_walk(n_frames=5, breathing=0.02, seed=5)
    path = tmp_path / "md.traj"
    frames = []
    for i in range(5):
        a = Atoms(SPECIES, positions=pos[i], cell=cells[i], pbc=True)
        a.set_velocities(vel[i] / (1000 * ase.units.fs))
        a.info["time_ps"] = 0.05 * i
        frames.append(a)
    ase.io.write(path, frames)
    assert detect_format(path) == "asefile"
    chunks = list(reader_module("asefile").iter_chunks(path, frames_per_chunk=2))
    assert [len(c) for c in chunks] == [2, 2, 1] and [c.first_frame for c in chunks] == [0, 2, 4]
    raw = read_raw(path)
    ref = ase.io.read(path, index=":")  # ASE is the reference
    np.testing.assert_allclose(raw.positions, [a.positions for a in ref], atol=1e-12)
    np.testing.assert_allclose(raw.cells, [a.cell[:] for a in ref], atol=1e-12)
    np.testing.assert_allclose(raw.velocities, vel, atol=1e-9)
    np.testing.assert_allclose(raw.times_ps, 0.05 * np.arange(5), atol=1e-12)
    assert raw.species == SPECIES


def test_asefile_bad_file_names_file_and_frame(tmp_path):
    path = tmp_path / "broken.traj"
    path.write_bytes(b"not an ase trajectory at all\n")
    with pytest.raises(InputError) as exc:
        read_raw(path)
    assert_names(exc.value, path, frame=1)


# ------------------------------------------------------------------ compression, streams, chunks
def _write(fmt, path, cells, pos, vel):
    if fmt == "xdatcar":
        write_xdatcar(path, SPECIES, cells, pos)
    elif fmt == "lammpsdump":
        write_lammps_dump(path, SPECIES, cells, pos, steps=np.arange(len(pos)), velocities=vel)
    else:
        write_extxyz(path, SPECIES, cells, pos, velocities=vel)


NAMES = {"xdatcar": "XDATCAR", "lammpsdump": "run.lammpstrj", "extxyz": "run.extxyz"}


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
@pytest.mark.parametrize("opener", [gzip.open, bz2.open, lzma.open], ids=["gz", "bz2", "xz"])
def test_compressed_files_read_transparently(tmp_path, fmt, opener):
    cells, pos, vel = random_walk(n_frames=4, seed=6)
    plain = tmp_path / NAMES[fmt]
    _write(fmt, plain, cells, pos, vel)
    # compressed content under a name without a compression extension: told by content
    packed = tmp_path / ("packed_" + NAMES[fmt])
    with opener(packed, "wb") as f:
        f.write(plain.read_bytes())
    a, b = read_quiet(plain), read_quiet(packed)
    np.testing.assert_array_equal(a.positions, b.positions)
    np.testing.assert_array_equal(a.cells, b.cells)
    assert a.species == b.species


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_open_files_and_chunks(tmp_path, fmt):
    cells, pos, vel = random_walk(n_frames=5, seed=7)
    path = tmp_path / NAMES[fmt]
    _write(fmt, path, cells, pos, vel)
    whole = read_quiet(path)
    with open(path, "rb") as f:
        from_binary = read_quiet(f, format=fmt)
        assert not f.closed  # the caller's file stays open
    with open(path, encoding="utf-8") as f:
        from_text = read_quiet(io.StringIO(f.read()), format=fmt)
    for other in (from_binary, from_text):
        np.testing.assert_array_equal(other.positions, whole.positions)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiffkitWarning)
        chunks = list(reader_module(fmt).iter_chunks(path, frames_per_chunk=2))
    assert [len(c) for c in chunks] == [2, 2, 1]
    assert [c.first_frame for c in chunks] == [0, 2, 4]
    np.testing.assert_array_equal(np.concatenate([c.positions for c in chunks]), whole.positions)


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_format_told_by_content(tmp_path, fmt):
    cells, pos, vel = random_walk(n_frames=2, seed=8)
    path = tmp_path / "trajectory_file"
    _write(fmt, path, cells, pos, vel)
    assert detect_format(path) == fmt
    others = [m for m in ("xdatcar", "lammpsdump", "extxyz") if m != fmt]
    head = path.read_text()[:4096]
    assert reader_module(fmt).sniff(head)
    assert not any(reader_module(m).sniff(head) for m in others)
    assert not reader_module("asefile").sniff(head)


# ------------------------------------------------------------------ XDATCAR specifics
XDATCAR_NEGATIVE_SCALE = """\
Li2S
  -1000.0
     2.0  0.0  0.0
     0.0  2.0  0.0
     0.0  0.0  4.0
   Li    S
    2    1
Direct configuration=     1
  0.10000000  0.20000000  0.30000000
  0.50000000  0.50000000  0.50000000
  0.90000000  0.00000000  0.25000000
"""


def test_xdatcar_negative_scale_is_volume(tmp_path):
    path = tmp_path / "XDATCAR"
    path.write_text(XDATCAR_NEGATIVE_SCALE)
    raw = read_raw(path)
    # VASP POSCAR convention (VASP manual, POSCAR): a negative scale factor is the cell volume.
    assert abs(np.linalg.det(raw.cells[0]) - 1000.0) < 1e-9
    np.testing.assert_allclose(raw.cells[0], np.diag([2.0, 2.0, 4.0]) * (1000 / 16) ** (1 / 3))
    np.testing.assert_allclose(raw.positions[0, 0], np.array([0.1, 0.2, 0.3]) @ raw.cells[0])
    assert raw.species == ("Li", "Li", "S")


def test_xdatcar_potcar_style_names_and_three_scale_factors(tmp_path):
    text = XDATCAR_NEGATIVE_SCALE.replace("   Li    S", "   Li_sv/7a2b3c    S_GW")
    text = text.replace("  -1000.0", "  1.5 2.0 0.5")
    path = tmp_path / "XDATCAR"
    path.write_text(text)
    raw = read_raw(path)
    assert raw.species == ("Li", "Li", "S")
    # VASP POSCAR convention (VASP wiki, from memory): three scale factors multiply the x, y
    # and z Cartesian components of the lattice vectors.
    np.testing.assert_allclose(raw.cells[0], np.diag([3.0, 4.0, 2.0]))
    np.testing.assert_allclose(raw.positions[0, 1], [1.5, 2.0, 1.0])


def test_xdatcar_vasp4_layout_needs_type_map(tmp_path):
    lines = XDATCAR_NEGATIVE_SCALE.replace("  -1000.0", "  1.0").splitlines(True)
    del lines[5]  # no element names line (VASP 4)
    path = tmp_path / "XDATCAR"
    path.write_text("".join(lines))
    with pytest.raises(InputError, match="type_map") as exc:
        read_raw(path)
    assert_names(exc.value, path, frame=1, line=6)
    raw = read_raw(path, type_map={1: "Na", 2: "Cl"})
    assert raw.species == ("Na", "Na", "Cl")


def test_xdatcar_cartesian_blocks(tmp_path):
    cells, pos, _ = random_walk(n_frames=3, breathing=0.02, seed=9)
    direct, cart = tmp_path / "d.XDATCAR", tmp_path / "c.XDATCAR"
    write_xdatcar(direct, SPECIES, cells, pos)
    write_xdatcar(cart, SPECIES, cells, pos, coordinates="cartesian")
    assert "Cartesian configuration=" in cart.read_text()
    # the same atoms: Cartesian Å (printed to 1e-8) against fractional (1e-8 of ~10 Å)
    np.testing.assert_allclose(read_raw(cart).positions, read_raw(direct).positions, atol=TOL)


# ------------------------------------------------------------------ LAMMPS specifics
def test_lammps_needs_type_map_without_element_column(tmp_path):
    cells, pos, _ = random_walk(n_frames=2, seed=10)
    path = tmp_path / "dump.run"
    write_lammps_dump(path, SPECIES, cells, pos, steps=[0, 10], element_column=False,
                      shuffle_seed=1)
    with pytest.raises(InputError, match="type_map") as exc:
        read_raw(path, units="metal")
    assert_names(exc.value, path, frame=1, line=9)
    raw = read_raw(path, units="metal", type_map={"1": "Li", 2: "P", 3: "S"})  # TOML gives "1"
    assert raw.species == SPECIES
    np.testing.assert_allclose(raw.positions, pos, atol=TOL)
    with pytest.raises(InputError, match="type 3") as exc:
        read_raw(path, units="metal", type_map={1: "Li", 2: "P"})
    assert_names(exc.value, path, frame=1)


def test_lammps_unit_styles(tmp_path):
    cells, pos, vel = random_walk(n_frames=3, seed=11)
    path = tmp_path / "real.lammpstrj"
    write_lammps_dump(path, SPECIES, cells, pos, steps=[0, 5, 10], velocities=vel, units="real")
    text = path.read_text()
    # velocities in the file are Å/fs: 1 Å/ps = 0.001 Å/fs
    first_v = float(text.split("ITEM: ATOMS")[1].splitlines()[1].split()[-3])
    assert abs(first_v - vel[0, 0, 0] / 1000) < 1e-9
    raw = read_raw(path, units="real")
    np.testing.assert_allclose(raw.velocities, vel, atol=1e-6)
    assert raw.meta["units"] == "real"
    with pytest.warns(DiffkitWarning, match="metal"):
        assumed = read_raw(path)
    assert assumed.meta["units"] == "metal"
    for style in ("lj", "si", "electron"):
        with pytest.raises(InputError, match=repr(style)) as exc:
            read_raw(path, units=style)
        assert str(path) in str(exc.value)


def test_lammps_units_and_time_items(tmp_path):
    """``ITEM: UNITS`` (dump_modify units yes) and ``ITEM: TIME`` (dump_modify time yes)."""
    frame = ("ITEM: UNITS\nreal\nITEM: TIME\n{t}\nITEM: TIMESTEP\n{s}\nITEM: NUMBER OF ATOMS\n2\n"
             "ITEM: BOX BOUNDS pp pp pp\n0 10\n0 10\n0 10\nITEM: ATOMS id element x y z vx vy vz\n"
             "2 S 5 5 5 0 0 0\n1 Li 1 2 3 0.002 0 0\n")
    path = tmp_path / "items.dump"
    path.write_text(frame.format(t=0.0, s=0) + frame.format(t=20.0, s=10))
    with warnings.catch_warnings():
        warnings.simplefilter("error", DiffkitWarning)  # the file says its units: no warning
        raw = read_raw(path)
    assert raw.meta["units"] == "real"
    np.testing.assert_allclose(raw.times_ps, [0.0, 0.020])  # 20 fs
    np.testing.assert_allclose(raw.velocities[0, 0], [2.0, 0, 0])  # 0.002 Å/fs = 2 Å/ps
    np.testing.assert_allclose(raw.positions[0, 0], [1, 2, 3])
    with pytest.raises(InputError, match="'real'") as exc:
        read_raw(path, units="metal")
    assert_names(exc.value, path, frame=1, line=2)


def test_lammps_images_give_unwrapped_path(tmp_path):
    cells, pos, _ = random_walk(n_frames=4, cell=TRICLINIC, seed=12, step=2.0)
    path = tmp_path / "img.lammpstrj"
    write_lammps_dump(path, SPECIES, cells, pos, steps=range(4), kind="wrapped+images",
                      shuffle_seed=3)
    raw = read_raw(path, units="metal")
    assert raw.kind == "wrapped" and raw.images is not None
    assert np.abs(raw.images).max() >= 1  # the walk leaves the cell
    unwrapped = raw.positions + np.einsum("fni,fij->fnj", raw.images, raw.cells)
    np.testing.assert_allclose(unwrapped, pos, atol=TOL)


# ------------------------------------------------------------------ extended XYZ specifics
def _xyz(comment, rows=("Li 0 0 0", "S 1 1 1")):
    return f"{len(rows)}\n{comment}\n" + "".join(r + "\n" for r in rows)


LAT = 'Lattice="5 0 0 0 5 0 0 0 5" Properties=species:S:1:pos:R:3'


def test_extxyz_time_units(tmp_path):
    path = tmp_path / "t.extxyz"
    path.write_text(_xyz(LAT + " time=0") + _xyz(LAT + " time=10"))
    with pytest.warns(DiffkitWarning, match="fs"):
        raw = read_raw(path)
    np.testing.assert_allclose(raw.times_ps, [0.0, 0.010])
    path.write_text(_xyz(LAT + " time=0 time_unit=ps step=3")
                    + _xyz(LAT + " time=10 time_unit=ps step=4"))
    raw = read_raw(path)
    np.testing.assert_allclose(raw.times_ps, [0.0, 10.0])
    np.testing.assert_array_equal(raw.steps, [3, 4])


def test_extxyz_unwrapped_flag_and_default_properties(tmp_path):
    path = tmp_path / "u.extxyz"
    path.write_text(_xyz('Lattice="5 0 0 0 5 0 0 0 5" unwrapped=T', ("Li 7 0 0", "S -1 1 1")) * 2)
    raw = read_raw(path)
    assert raw.kind == "unwrapped"
    np.testing.assert_allclose(raw.positions[1], [[7, 0, 0], [-1, 1, 1]])


# ------------------------------------------------------------------ bad input
@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_empty_file(tmp_path, fmt):
    path = tmp_path / NAMES[fmt]
    path.write_text("")
    with pytest.raises(InputError, match="empty") as exc:
        read_quiet(path, format=fmt)
    assert_names(exc.value, path, line=1)


def _frame_starts(text, fmt):
    """Line numbers (from 1) where each frame starts."""
    lines = text.splitlines()
    if fmt == "xdatcar":
        return [i + 1 for i, l in enumerate(lines) if l.startswith("Direct configuration")]
    if fmt == "lammpsdump":
        return [i + 1 for i, l in enumerate(lines) if l.startswith("ITEM: TIMESTEP")]
    return [i + 1 for i, l in enumerate(lines) if l.strip() == str(len(SPECIES))]


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
@pytest.mark.parametrize("cut", ["mid-line", "line-boundary"])
def test_truncated_last_frame_dropped_with_warning(tmp_path, fmt, cut):
    cells, pos, vel = random_walk(n_frames=4, seed=13)
    path = tmp_path / NAMES[fmt]
    _write(fmt, path, cells, pos, vel)
    text = path.read_text()
    start4 = _frame_starts(text, fmt)[3]
    if cut == "mid-line":
        text = text[:-9]
    else:
        text = "".join(text.splitlines(True)[:-3])
    path.write_text(text)
    with pytest.warns(DiffkitWarning, match="frame 4") as rec:
        raw = read_raw(path, units="metal")
    msg = next(str(w.message) for w in rec if "frame 4" in str(w.message))
    assert str(path) in msg and f"line {start4}" in msg
    assert len(raw.positions) == 3
    np.testing.assert_allclose(raw.positions, read_quiet(path, frames_per_chunk=1).positions)


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_no_complete_frame_is_an_error(tmp_path, fmt):
    cells, pos, vel = random_walk(n_frames=1, seed=14)
    path = tmp_path / NAMES[fmt]
    _write(fmt, path, cells, pos, vel)
    path.write_text(path.read_text()[:-30])
    with pytest.raises(InputError, match="no complete frame") as exc:
        read_quiet(path)
    assert_names(exc.value, path, frame=1)


def _delete_atom_line(text, fmt, frame):
    """Remove the first atom line of frame ``frame`` (from 1) without fixing counts."""
    lines = text.splitlines(True)
    start = _frame_starts(text, fmt)[frame - 1]
    offset = {"xdatcar": 1, "lammpsdump": 9, "extxyz": 2}[fmt]
    del lines[start - 1 + offset]
    return "".join(lines)


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_atom_line_missing_in_a_frame(tmp_path, fmt):
    cells, pos, vel = random_walk(n_frames=4, seed=15)
    path = tmp_path / NAMES[fmt]
    _write(fmt, path, cells, pos, vel)
    text = path.read_text()
    start2 = _frame_starts(text, fmt)[1]
    path.write_text(_delete_atom_line(text, fmt, 2))
    with pytest.raises(InputError) as exc:
        read_quiet(path)
    assert_names(exc.value, path, frame=2, line=start2 if fmt != "lammpsdump" else start2 + 8)
    assert f"{len(SPECIES) - 1} atom" in str(exc.value)


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_atom_count_changes_between_frames(tmp_path, fmt):
    cells, pos, vel = random_walk(n_frames=2, seed=16)
    a, b = tmp_path / ("a_" + NAMES[fmt]), tmp_path / ("b_" + NAMES[fmt])
    if fmt == "xdatcar":  # variable-cell layout: each frame has its own counts line
        write_xdatcar(a, SPECIES, cells, pos, constant_cell=False)
        write_xdatcar(b, SPECIES[:-1], cells, pos[:, :-1], constant_cell=False)
    elif fmt == "lammpsdump":
        write_lammps_dump(a, SPECIES, cells, pos, steps=[0, 1])
        write_lammps_dump(b, SPECIES[:-1], cells, pos[:, :-1], steps=[2, 3])
    else:
        write_extxyz(a, SPECIES, cells, pos)
        write_extxyz(b, SPECIES[:-1], cells, pos[:, :-1])
    path = tmp_path / NAMES[fmt]
    text_a = a.read_text()
    path.write_text(text_a + b.read_text())
    frame3_line = text_a.count("\n") + 1
    with pytest.raises(InputError) as exc:
        read_quiet(path)
    assert_names(exc.value, path, frame=3, line=frame3_line)
    assert f"{len(SPECIES) - 1} atoms, expected {len(SPECIES)}" in str(exc.value)


def test_xdatcar_extra_atom_line(tmp_path):
    cells, pos, _ = random_walk(n_frames=3, seed=17)
    path = tmp_path / "XDATCAR"
    write_xdatcar(path, SPECIES, cells, pos)
    lines = path.read_text().splitlines(True)
    start2 = _frame_starts("".join(lines), "xdatcar")[1]
    lines.insert(start2 + 1, "  0.50000000  0.50000000  0.50000000\n")
    path.write_text("".join(lines))
    with pytest.raises(InputError, match=f"{len(SPECIES) + 1} atoms, expected") as exc:
        read_raw(path)
    assert_names(exc.value, path, frame=2, line=start2)


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
@pytest.mark.parametrize("bad", ["abc", "nan", "inf", "-Infinity"])
def test_non_numeric_or_non_finite_coordinate(tmp_path, fmt, bad):
    cells, pos, vel = random_walk(n_frames=3, seed=18)
    path = tmp_path / NAMES[fmt]
    _write(fmt, path, cells, pos, vel)
    lines = path.read_text().splitlines(True)
    start3 = _frame_starts("".join(lines), fmt)[2]
    offset = {"xdatcar": 1, "lammpsdump": 9, "extxyz": 2}[fmt]
    target = start3 + offset + 2  # the third atom line of frame 3, 1-based line number
    fields = lines[target - 1].split()
    col = {"xdatcar": 1, "lammpsdump": 4, "extxyz": 2}[fmt]  # a y coordinate
    fields[col] = bad
    lines[target - 1] = " ".join(fields) + "\n"
    path.write_text("".join(lines))
    with pytest.raises(InputError) as exc:
        read_quiet(path)
    assert_names(exc.value, path, frame=3, line=target)


def test_unknown_elements(tmp_path):
    cells, pos, vel = random_walk(n_frames=2, seed=19)
    species = SPECIES[:-1] + ("Qq",)
    x = tmp_path / "XDATCAR"
    write_xdatcar(x, species, cells, pos)
    with pytest.raises(InputError, match="'Qq'") as exc:
        read_raw(x)
    assert_names(exc.value, x, frame=1, line=6)
    d = tmp_path / "run.lammpstrj"
    write_lammps_dump(d, species, cells, pos, steps=[0, 1])
    with pytest.raises(InputError, match="'Qq'") as exc:
        read_raw(d, units="metal")
    assert_names(exc.value, d, frame=1)
    e = tmp_path / "run.extxyz"
    write_extxyz(e, species, cells, pos)
    with pytest.raises(InputError, match="'Qq'") as exc:
        read_raw(e)
    assert_names(exc.value, e, frame=1, line=2 + len(species))


def test_missing_columns(tmp_path):
    cells, pos, _ = random_walk(n_frames=2, seed=20)
    d = tmp_path / "run.lammpstrj"
    write_lammps_dump(d, SPECIES, cells, pos, steps=[0, 1], kind="wrapped")
    d.write_text(d.read_text().replace("element x y z", "element x y q"))
    with pytest.raises(InputError, match="'z'") as exc:
        read_raw(d, units="metal")
    assert_names(exc.value, d, frame=1, line=9)
    e = tmp_path / "run.extxyz"
    e.write_text(_xyz('Lattice="5 0 0 0 5 0 0 0 5" Properties=species:S:1:velo:R:3'))
    with pytest.raises(InputError, match="pos") as exc:
        read_raw(e)
    assert_names(exc.value, e, frame=1, line=2)
    e.write_text(_xyz("Properties=species:S:1:pos:R:3"))
    with pytest.raises(InputError, match="Lattice") as exc:
        read_raw(e)
    assert_names(exc.value, e, frame=1, line=2)
    e.write_text(_xyz(LAT, ("Li 0 0", "S 1 1 1")))  # a short atom line
    with pytest.raises(InputError, match="fields") as exc:
        read_raw(e)
    assert_names(exc.value, e, frame=1, line=3)


def test_lammps_duplicate_or_changed_ids(tmp_path):
    cells, pos, _ = random_walk(n_frames=2, seed=21)
    d = tmp_path / "run.lammpstrj"
    write_lammps_dump(d, SPECIES, cells, pos, steps=[0, 1])
    text = d.read_text()
    head, second = text.rsplit("ITEM: TIMESTEP", 1)
    second = second.replace("\n2 1 Li", "\n99 1 Li")
    d.write_text(head + "ITEM: TIMESTEP" + second)
    with pytest.raises(InputError, match="99") as exc:
        read_raw(d, units="metal")
    assert_names(exc.value, d, frame=2, line=head.count("\n") + 9)
