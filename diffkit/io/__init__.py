"""Trajectory file formats: one module per format, one table of them.

``FORMATS`` maps a format name to its :class:`FormatInfo`; the reader module is
``diffkit.io.<name>`` and is imported only when a file of that format is read.
Each reader module provides::

    sniff(head: str) -> bool
        True when the first few kB of text look like this format.
    iter_chunks(path, *, frames_per_chunk, type_map=None, units=None)
        -> Iterator[FrameChunk]
        Frames exactly as the file holds them (converted to Å, ps, Cartesian).

``read_raw`` returns all frames of one file as the file holds them (for checks
against other programs); :func:`diffkit.read_trajectory` turns files into an
unwrapped :class:`~diffkit.trajectory.Trajectory`.
"""

from __future__ import annotations

import bz2
import gzip
import importlib
import io
import lzma
import os
from dataclasses import dataclass, field

import numpy as np

from ..errors import InputError

__all__ = ["FORMATS", "FormatInfo", "FrameChunk", "register_format", "detect_format",
           "open_text", "read_raw", "source_name"]


@dataclass(frozen=True)
class FormatInfo:
    """One file format diffkit reads."""

    name: str
    description: str
    extensions: tuple = ()
    name_patterns: tuple = ()  # lower-case substrings of a file name that identify the format


FORMATS: dict = {}
_EXTENSIONS: dict = {}


def register_format(name, description, extensions=(), name_patterns=()):
    """Add a format to ``FORMATS``; a duplicate name or extension is an error."""
    if name in FORMATS:
        raise ValueError(f"format {name!r} registered twice")
    for ext in extensions:
        if ext in _EXTENSIONS:
            raise ValueError(f"extension {ext!r} claimed by {_EXTENSIONS[ext]!r} and {name!r}")
        _EXTENSIONS[ext] = name
    FORMATS[name] = FormatInfo(name, description, tuple(extensions), tuple(name_patterns))


register_format("xdatcar", "VASP XDATCAR (constant or variable cell)", (".xdatcar",), ("xdatcar",))
register_format("lammpsdump", "LAMMPS text dump (any columns, orthogonal or triclinic box)",
                (".lammpstrj", ".dump", ".lammpsdump"), ("dump.",))
register_format("extxyz", "extended XYZ (Lattice=, Properties=, optional time)", (".extxyz", ".xyz"))
register_format("asefile", "any other trajectory ase.io can read (vasprun.xml, .traj, ...)",
                (".traj", ".xml", ".nc", ".cif", ".pdb", ".gro"), ("vasprun",))

_COMPRESSED = {b"\x1f\x8b": gzip.open, b"BZh": bz2.open, b"\xfd7zXZ\x00": lzma.open}
_COMPRESSED_EXT = (".gz", ".bz2", ".xz")


@dataclass
class FrameChunk:
    """Consecutive frames of one file, as the file holds them.

    Attributes
    ----------
    species : tuple of str, n_atoms
    cells : (k, 3, 3) float, Å, rows are lattice vectors
    positions : (k, n_atoms, 3) float, Å, Cartesian
    kind : {"wrapped", "unwrapped"}
    images : (k, n_atoms, 3) int or None
        Periodic image flags where the file has them.
    steps : (k,) int or None
        MD step numbers where the file has them.
    times_ps : (k,) float or None, ps
        Frame times where the file has them.
    velocities : (k, n_atoms, 3) float or None, Å/ps
    first_frame : int
        Index (from 0) of the chunk's first frame in its file.
    source : str
        The file's name, for messages.
    meta : dict
        Run facts the file holds (``temperature_K``, ``frame_interval_ps``).
    """

    species: tuple
    cells: np.ndarray
    positions: np.ndarray
    kind: str
    images: np.ndarray | None = None
    steps: np.ndarray | None = None
    times_ps: np.ndarray | None = None
    velocities: np.ndarray | None = None
    first_frame: int = 0
    source: str = "<data>"
    meta: dict = field(default_factory=dict)

    def __len__(self):
        return len(self.positions)


def source_name(path_or_file):
    """A printable name for a path or an open file."""
    if isinstance(path_or_file, (str, os.PathLike)):
        return os.fspath(path_or_file)
    return str(getattr(path_or_file, "name", "<stream>"))


def open_text(path_or_file):
    """Open a path (plain, gzip, bz2 or xz, told by content) or wrap an open file as text.

    Returns a text stream; the caller closes it. Never writes to the input.
    """
    if not isinstance(path_or_file, (str, os.PathLike)):
        f = path_or_file
        if isinstance(f, io.TextIOBase):
            return f
        return io.TextIOWrapper(f, encoding="utf-8", errors="replace")
    return open_path(path_or_file, text=True)


def open_path(path, *, text):
    """Open a file path, decompressing gzip, bz2 or xz told by content.

    A missing file, a folder or an unreadable file is an InputError naming it.
    ``text=True`` gives a UTF-8 text stream, else a binary one; the caller closes it.
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as f:
            magic = f.read(6)
    except FileNotFoundError as exc:
        raise InputError(f"{path}: no such file") from exc
    except IsADirectoryError as exc:
        raise InputError(f"{path}: is a folder, expected a trajectory file") from exc
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from exc
    kw = {"encoding": "utf-8", "errors": "replace"} if text else {}
    mode = "rt" if text else "rb"
    for sig, opener in _COMPRESSED.items():
        if magic.startswith(sig):
            return opener(path, mode, **kw)
    return open(path, mode, **kw)


def _plain_name(path):
    name = os.path.basename(os.fspath(path)).lower()
    for ext in _COMPRESSED_EXT:
        if name.endswith(ext):
            name = name[: -len(ext)]
    return name


def reader_module(name):
    """Import the reader module of format ``name``."""
    if name not in FORMATS:
        raise InputError(f"unknown format {name!r}; known formats: {', '.join(FORMATS)}")
    return importlib.import_module(f"{__name__}.{name}")


def detect_format(path):
    """Tell the format of a file from its name, else from its first lines.

    Raises
    ------
    InputError
        When neither tells; the message lists the known formats.
    """
    name = _plain_name(path)
    ext = os.path.splitext(name)[1]
    if ext in _EXTENSIONS:
        return _EXTENSIONS[ext]
    for fmt in FORMATS.values():
        if any(p in name for p in fmt.name_patterns):
            return fmt.name
    with open_text(path) as f:
        head = f.read(4096)
    if not head.strip():
        raise InputError(f"{source_name(path)}: line 1: file is empty, expected a trajectory")
    for fmt in FORMATS:
        if fmt == "asefile":
            continue
        try:
            if reader_module(fmt).sniff(head):
                return fmt
        except ImportError:  # pragma: no cover - a reader module not written yet
            continue
    raise InputError(f"{source_name(path)}: cannot tell the file format from its name or first "
                     f"lines; give format= (known formats: {', '.join(FORMATS)})")


@dataclass
class RawFrames:
    """All frames of one file as the file holds them (see :class:`FrameChunk`)."""

    species: tuple
    cells: np.ndarray
    positions: np.ndarray
    kind: str
    images: np.ndarray | None
    steps: np.ndarray | None
    times_ps: np.ndarray | None
    velocities: np.ndarray | None
    meta: dict


def _cat(chunks, attr):
    vals = [getattr(c, attr) for c in chunks]
    if any(v is None for v in vals):
        return None
    return np.concatenate(vals)


def read_raw(path, format=None, *, type_map=None, units=None, frames_per_chunk=1000):
    """Read every frame of one file without unwrapping.

    Parameters
    ----------
    path : str, path-like or open file
    format : str, optional
        A key of ``FORMATS``; detected when omitted.

    Returns
    -------
    RawFrames
    """
    fmt = format or detect_format(path)
    mod = reader_module(fmt)
    chunks = list(mod.iter_chunks(path, frames_per_chunk=frames_per_chunk,
                                  type_map=type_map, units=units))
    if not chunks:
        raise InputError(f"{source_name(path)}: no complete frame found")
    meta = {}
    for c in chunks:
        meta.update(c.meta)
    return RawFrames(chunks[0].species, _cat(chunks, "cells"), _cat(chunks, "positions"),
                     chunks[0].kind, _cat(chunks, "images"), _cat(chunks, "steps"),
                     _cat(chunks, "times_ps"), _cat(chunks, "velocities"), meta)
