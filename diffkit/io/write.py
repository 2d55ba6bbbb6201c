"""Writers for the trajectory formats diffkit reads (for generated data, tests and demos).

Arrays come in internal units (Å, ps, Cartesian). Each writer formats whole
frames at once, compresses when the path ends in ``.gz``, ``.bz2`` or ``.xz``,
and replaces the target only when the whole file is written
(:func:`diffkit.io.atomic.atomic_path`). Numbers are written in fixed-width
fields where the format's usual writers do so (XDATCAR, extended XYZ).
"""

from __future__ import annotations

import bz2
import contextlib
import gzip
import lzma
import os

import numpy as np

from ..errors import UsageError
from ..units import parse_time_ps
from .atomic import atomic_path

__all__ = ["write_xdatcar", "write_lammps_dump", "write_extxyz", "LAMMPS_KINDS"]

#: Position columns written by :func:`write_lammps_dump` for each ``kind``.
LAMMPS_KINDS = {
    "unwrapped": ("xu", "yu", "zu"),
    "wrapped": ("x", "y", "z"),
    "wrapped+images": ("x", "y", "z", "ix", "iy", "iz"),
    "scaled": ("xs", "ys", "zs"),
    "scaled+images": ("xs", "ys", "zs", "ix", "iy", "iz"),
    "scaled-unwrapped": ("xsu", "ysu", "zsu"),
}

_FRAMES_PER_WRITE = 200


@contextlib.contextmanager
def _text_out(path):
    """Open ``path`` for writing text through a temporary file; compress by extension."""
    path = os.fspath(path)
    low = path.lower()
    with atomic_path(path) as tmp:
        if low.endswith(".gz"):
            f = gzip.open(tmp, "wt", compresslevel=6, encoding="utf-8", newline="\n")
        elif low.endswith(".bz2"):
            f = bz2.open(tmp, "wt", encoding="utf-8", newline="\n")
        elif low.endswith(".xz"):
            f = lzma.open(tmp, "wt", encoding="utf-8", newline="\n")
        else:
            f = open(tmp, "w", encoding="utf-8", newline="\n")
        with f:
            yield f


def _check(species, cells, positions, velocities=None):
    species = tuple(str(s) for s in species)
    positions = np.asarray(positions, dtype=float)
    if positions.ndim != 3 or positions.shape[2] != 3:
        raise UsageError(f"positions must be (n_frames, n_atoms, 3), got shape {positions.shape}")
    n_frames, n_atoms = positions.shape[:2]
    if n_frames == 0 or n_atoms == 0:
        raise UsageError("nothing to write: positions hold no frames or no atoms")
    if len(species) != n_atoms:
        raise UsageError(f"{len(species)} species for {n_atoms} atoms")
    cells = np.asarray(cells, dtype=float)
    if cells.shape == (3, 3):
        cells = np.broadcast_to(cells, (n_frames, 3, 3))
    if cells.shape != (n_frames, 3, 3):
        raise UsageError(f"cells must be (3, 3) or ({n_frames}, 3, 3), got shape {cells.shape}")
    if not (np.isfinite(positions).all() and np.isfinite(cells).all()):
        raise UsageError("positions and cells must be finite")
    if np.any(np.abs(np.linalg.det(cells)) < 1e-12):
        raise UsageError("a cell spans no volume")
    if velocities is not None:
        velocities = np.asarray(velocities, dtype=float)
        if velocities.shape != positions.shape:
            raise UsageError(f"velocities must have the shape of positions {positions.shape}, "
                             f"got {velocities.shape}")
        if not np.isfinite(velocities).all():
            raise UsageError("velocities must be finite")
    return species, cells, positions, velocities


def _fractional(cells, positions):
    """(F, N, 3) fractional coordinates of Cartesian positions in per-frame cells."""
    return np.matmul(positions, np.linalg.inv(cells))


def _wrap_fraction(frac):
    """Fractional coordinates in [0, 1) and the whole cells removed, both (F, N, 3)."""
    images = np.floor(frac)
    wrapped = frac - images
    wrapped[wrapped >= 1.0] = 0.0  # -1e-17 - floor(-1e-17) rounds to 1.0
    return wrapped, images


def _write_frames(f, texts):
    f.write("".join(texts))


# ---------------------------------------------------------------------------- XDATCAR
def write_xdatcar(path, species, cells, positions, *, constant_cell=None, coordinates="direct",
                  title="diffkit trajectory"):
    """Write a VASP XDATCAR.

    Parameters
    ----------
    path : str or path-like
        Compressed when it ends in .gz, .bz2 or .xz.
    species : sequence of str, n_atoms
        Element symbol per atom; each run of equal neighbours becomes one entry of
        the names/counts lines, so atom order is kept.
    cells : (3, 3) or (n_frames, 3, 3) float, Å, rows are lattice vectors
    positions : (n_frames, n_atoms, 3) float, Å, Cartesian
        Wrapped into the cell on writing.
    constant_cell : bool, optional
        None: one header when every cell is equal, else the header before every
        frame (variable-cell layout). True with changing cells is an error.
    coordinates : {"direct", "cartesian"}
        Fractional (as VASP writes) or Cartesian Å coordinate blocks.
    title : str
        First line of each header.
    """
    species, cells, positions, _ = _check(species, cells, positions)
    if coordinates not in ("direct", "cartesian"):
        raise UsageError(f"coordinates must be 'direct' or 'cartesian', got {coordinates!r}")
    same = bool(np.all(cells == cells[0]))
    if constant_cell is None:
        constant_cell = same
    elif constant_cell and not same:
        raise UsageError("constant_cell=True but the cells change between frames")
    names, counts = [], []
    for s in species:
        if names and names[-1] == s:
            counts[-1] += 1
        else:
            names.append(s)
            counts.append(1)
    title = " ".join(str(title).split()) or "diffkit trajectory"

    def header(cell):
        rows = "".join(" %15.10f %15.10f %15.10f\n" % tuple(v) for v in cell)
        return (f"{title}\n{1.0:19.14f}\n{rows}" + "".join(f"{s:>5s}" for s in names) + "\n"
                + "".join(f"{c:>6d}" for c in counts) + "\n")

    wrapped, _ = _wrap_fraction(_fractional(cells, positions))
    n = len(species)
    if coordinates == "direct":
        values, word, row = wrapped, "Direct", "%12.8f%12.8f%12.8f\n"
    else:
        values = np.matmul(wrapped, cells)
        word, row = "Cartesian", "%14.8f%14.8f%14.8f\n"
    block = row * n
    with _text_out(path) as f:
        if constant_cell:
            f.write(header(cells[0]))
        texts = []
        for i in range(len(values)):
            head = "" if constant_cell else header(cells[i])
            texts.append(f"{head}{word} configuration={i + 1:6d}\n")
            texts.append(block % tuple(values[i].ravel().tolist()))
            if len(texts) >= 2 * _FRAMES_PER_WRITE:
                _write_frames(f, texts)
                texts = []
        _write_frames(f, texts)


# ---------------------------------------------------------------------------- LAMMPS
def _lammps_box(cell):
    """LAMMPS box lines (bounding box and tilts) of a lower-triangular cell with origin 0."""
    lx, ly, lz = cell[0, 0], cell[1, 1], cell[2, 2]
    xy, xz, yz = cell[1, 0], cell[2, 0], cell[2, 1]
    xlo_b = min(0.0, xy, xz, xy + xz)
    xhi_b = lx + max(0.0, xy, xz, xy + xz)
    ylo_b = min(0.0, yz)
    yhi_b = ly + max(0.0, yz)
    return (xlo_b, xhi_b, xy), (ylo_b, yhi_b, xz), (0.0, lz, yz)


def write_lammps_dump(path, species, cells, positions, *, steps, kind="unwrapped",
                      velocities=None, element_column=True, shuffle_seed=None, units="metal",
                      triclinic=None):
    """Write a LAMMPS text dump (``dump custom`` layout).

    Parameters
    ----------
    path : str or path-like
        Compressed when it ends in .gz, .bz2 or .xz.
    species : sequence of str, n_atoms
        Element symbol per atom; atom types are numbered 1, 2, ... in order of
        first appearance; ids are 1..n_atoms in the given order.
    cells : (3, 3) or (n_frames, 3, 3) float, Å
        Rows are lattice vectors in LAMMPS orientation: a along x, b in the xy
        plane (lower-triangular matrix). The box origin is written as 0.
    positions : (n_frames, n_atoms, 3) float, Å, Cartesian
    steps : (n_frames,) int
        TIMESTEP of each frame.
    kind : str
        A key of :data:`LAMMPS_KINDS`: ``"unwrapped"`` (xu yu zu as given),
        ``"wrapped"`` (x y z in the cell), ``"wrapped+images"`` (x y z ix iy iz),
        ``"scaled"`` (xs ys zs in [0, 1)), ``"scaled+images"``,
        ``"scaled-unwrapped"`` (xsu ysu zsu).
    velocities : (n_frames, n_atoms, 3) float, Å/ps, optional
        Written as vx vy vz in the unit style's velocity unit.
    element_column : bool
        Write an ``element`` column beside ``type``.
    shuffle_seed : int, optional
        Shuffle the atom lines of every frame (as parallel LAMMPS runs do).
    units : {"metal", "real"}
        Unit style: velocities in Å/ps (metal) or Å/fs (real).
    triclinic : bool, optional
        Write tilt factors; default: when any cell has a non-zero tilt.
    """
    species, cells, positions, velocities = _check(species, cells, positions, velocities)
    if kind not in LAMMPS_KINDS:
        raise UsageError(f"kind must be one of {sorted(LAMMPS_KINDS)}, got {kind!r}")
    if units not in ("metal", "real"):
        raise UsageError(f"units must be 'metal' or 'real', got {units!r}")
    steps = np.asarray(steps)
    if steps.shape != (len(positions),):
        raise UsageError(f"steps must have one value per frame ({len(positions)}), "
                         f"got shape {steps.shape}")
    upper = np.abs(cells[:, [0, 0, 1], [1, 2, 2]])
    if np.any(upper > 1e-10 * np.abs(cells).max()):
        raise UsageError("LAMMPS cells must be lower-triangular (a along x, b in the xy plane); "
                         "rotate the cell and positions first")
    tilts = cells[:, [1, 2, 2], [0, 0, 1]]
    if triclinic is None:
        triclinic = bool(np.any(tilts != 0.0))
    elif not triclinic and np.any(tilts != 0.0):
        raise UsageError("triclinic=False but a cell has non-zero tilt factors")
    n_frames, n = positions.shape[:2]
    types = {}
    for s in species:
        types.setdefault(s, len(types) + 1)
    frac = _fractional(cells, positions)
    wrapped, images = _wrap_fraction(frac)
    if kind == "unwrapped":
        cols = [positions]
    elif kind in ("wrapped", "wrapped+images"):
        cols = [np.matmul(wrapped, cells)]
    elif kind in ("scaled", "scaled+images"):
        cols = [wrapped]
    else:
        cols = [frac]
    fmt = ["%.10g %.10g %.10g"]
    if kind.endswith("+images"):
        cols.append(images)
        fmt.append("%d %d %d")
    if velocities is not None:
        scale = parse_time_ps("1fs") if units == "real" else 1.0  # Å/ps -> Å/fs for real
        cols.append(velocities * scale)
        fmt.append("%.10g %.10g %.10g")
    data = np.concatenate(cols, axis=2)
    names = ["id", "type"] + (["element"] if element_column else []) + list(LAMMPS_KINDS[kind])
    if velocities is not None:
        names += ["vx", "vy", "vz"]
    value_fmt = " ".join(fmt)
    rows = np.array([f"{i + 1} {types[s]} " + (f"{s} " if element_column else "") + value_fmt
                     + "\n" for i, s in enumerate(species)], dtype=object)
    box_kw = "ITEM: BOX BOUNDS xy xz yz pp pp pp\n" if triclinic else "ITEM: BOX BOUNDS pp pp pp\n"
    rng = np.random.default_rng(shuffle_seed) if shuffle_seed is not None else None
    block = "".join(rows)
    with _text_out(path) as f:
        texts = []
        for i in range(n_frames):
            box = _lammps_box(cells[i])
            if triclinic:
                box_text = "".join("%.10g %.10g %.10g\n" % b for b in box)
            else:
                box_text = "".join("%.10g %.10g\n" % b[:2] for b in box)
            texts.append(f"ITEM: TIMESTEP\n{int(steps[i])}\nITEM: NUMBER OF ATOMS\n{n}\n"
                         f"{box_kw}{box_text}ITEM: ATOMS {' '.join(names)}\n")
            if rng is not None:
                order = rng.permutation(n)
                texts.append("".join(rows[order]) % tuple(data[i, order].ravel().tolist()))
            else:
                texts.append(block % tuple(data[i].ravel().tolist()))
            if len(texts) >= 2 * _FRAMES_PER_WRITE:
                _write_frames(f, texts)
                texts = []
        _write_frames(f, texts)


# ---------------------------------------------------------------------------- extended XYZ
def write_extxyz(path, species, cells, positions, *, times_ps=None, velocities=None,
                 unwrapped=False, steps=None):
    """Write an extended XYZ trajectory.

    Parameters
    ----------
    path : str or path-like
        Compressed when it ends in .gz, .bz2 or .xz.
    species : sequence of str, n_atoms
    cells : (3, 3) or (n_frames, 3, 3) float, Å, rows are lattice vectors
    positions : (n_frames, n_atoms, 3) float, Å, Cartesian
        Wrapped into the cell unless ``unwrapped``.
    times_ps : (n_frames,) float, ps, optional
        Written as ``time_ps=`` on each comment line.
    velocities : (n_frames, n_atoms, 3) float, Å/ps, optional
        Written as a ``velo:R:3`` column with ``velocity_unit=A/ps``.
    unwrapped : bool
        Write positions as given and mark the frames ``unwrapped=T``.
    steps : (n_frames,) int, optional
        Written as ``step=``.
    """
    species, cells, positions, velocities = _check(species, cells, positions, velocities)
    n_frames, n = positions.shape[:2]
    for name, arr in (("times_ps", times_ps), ("steps", steps)):
        if arr is not None and np.shape(arr) != (n_frames,):
            raise UsageError(f"{name} must have one value per frame ({n_frames}), "
                             f"got shape {np.shape(arr)}")
    if unwrapped:
        coords = positions
    else:
        wrapped, _ = _wrap_fraction(_fractional(cells, positions))
        coords = np.matmul(wrapped, cells)
    props = "species:S:1:pos:R:3"
    value_fmt = "%16.8f%16.8f%16.8f"
    if velocities is not None:
        props += ":velo:R:3"
        value_fmt += "%16.8f%16.8f%16.8f"
        data = np.concatenate([coords, velocities], axis=2)
    else:
        data = coords
    width = max(2, max(len(s) for s in species))
    block = "".join(f"{s:<{width}s}" + value_fmt + "\n" for s in species)
    extra = ""
    if velocities is not None:
        extra += " velocity_unit=A/ps"
    if unwrapped:
        extra += " unwrapped=T"
    with _text_out(path) as f:
        texts = []
        for i in range(n_frames):
            lattice = " ".join("%.10f" % x for x in cells[i].ravel())
            head = f'{n}\nLattice="{lattice}" Properties={props}'
            if times_ps is not None:
                head += " time_ps=%.10g" % float(times_ps[i])
            if steps is not None:
                head += f" step={int(steps[i])}"
            texts.append(head + extra + ' pbc="T T T"\n')
            texts.append(block % tuple(data[i].ravel().tolist()))
            if len(texts) >= 2 * _FRAMES_PER_WRITE:
                _write_frames(f, texts)
                texts = []
        _write_frames(f, texts)
