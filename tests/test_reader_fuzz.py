"""Fuzzing the text readers: damaged files give a clean read or one clear diffkit error.

Each reader gets small files written by diffkit's writers (and one by ASE),
damaged by hypothesis: cut short at any byte, bytes overwritten, lines deleted
or repeated, two fields of a line swapped (the header lines are picked more
often). Every outcome must be one of:

- a clean read: all positions finite, no more frames than the file had, and
  fewer frames only with a DiffkitWarning — except when the cut falls exactly
  on a frame boundary, which no reader can tell from a shorter file (the text
  left is then a valid trajectory of fewer frames);
- an InputError whose message names the file and a frame or a line.

Any other exception (a bare numpy or Python error) fails the test. The same
damaged files also go through ``diffkit.read_trajectory`` (frame interval
given), which adds the time and unwrapping checks. This is common practice
for parsers (property-based fuzzing); the check is the contract of
docs/architecture.md ("Bad input"), not an outside number.
"""

from __future__ import annotations

import os
import re
import tempfile
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import diffkit
from diffkit.errors import DiffkitWarning, InputError
from diffkit.io import read_raw
from diffkit.io.write import write_extxyz, write_lammps_dump, write_xdatcar

SPECIES = ("Li", "Li", "Li", "P", "S", "S", "Li", "S")
N_FRAMES = 6
CELL = np.array([[8.0, 0.0, 0.0], [1.5, 9.0, 0.0], [-0.7, -0.4, 10.0]])
INTERVAL_PS = 0.01
FUZZ = settings(max_examples=200, deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow, HealthCheck.filter_too_much])
SMALL = settings(max_examples=60, deadline=None, derandomize=True, database=None)


def _walk(seed, breathing=0.0):
    rng = np.random.default_rng(seed)
    start = rng.random((len(SPECIES), 3)) @ CELL
    steps = rng.normal(scale=0.3, size=(N_FRAMES, len(SPECIES), 3))
    steps[0] = 0
    cells = CELL[None] * (1 + breathing * np.sin(np.arange(N_FRAMES)))[:, None, None]
    return cells, start + np.cumsum(steps, axis=0), rng.normal(scale=3.0, size=steps.shape)


def _make_files(folder):
    """{format: [(path, read keywords, frame-start markers)]} of undamaged files."""
    import ase
    import ase.io

    out = {"xdatcar": [], "lammpsdump": [], "extxyz": []}
    cells, pos, vel = _walk(1)
    p = os.path.join(folder, "const.XDATCAR")
    write_xdatcar(p, SPECIES, cells, pos)
    out["xdatcar"].append((p, {}, b"Direct configuration="))
    cells, pos, vel = _walk(2, breathing=0.02)
    p = os.path.join(folder, "npt.XDATCAR")
    write_xdatcar(p, SPECIES, cells, pos)
    out["xdatcar"].append((p, {}, b"diffkit trajectory\n"))
    steps = np.arange(N_FRAMES) * 10
    cells, pos, vel = _walk(3)
    p = os.path.join(folder, "sorted.lammpstrj")
    write_lammps_dump(p, SPECIES, cells, pos, steps=steps)
    out["lammpsdump"].append((p, {"units": "metal"}, b"ITEM: TIMESTEP\n"))
    p = os.path.join(folder, "shuffled.lammpstrj")
    write_lammps_dump(p, SPECIES, cells, pos, steps=steps, kind="wrapped+images",
                      velocities=vel, shuffle_seed=4)
    out["lammpsdump"].append((p, {"units": "metal"}, b"ITEM: TIMESTEP\n"))
    p = os.path.join(folder, "typed.lammpstrj")
    write_lammps_dump(p, SPECIES, cells, pos, steps=steps, kind="scaled", element_column=False)
    out["lammpsdump"].append((p, {"units": "metal", "type_map": {1: "Li", 2: "P", 3: "S"}},
                              b"ITEM: TIMESTEP\n"))
    cells, pos, vel = _walk(5, breathing=0.02)
    p = os.path.join(folder, "run.extxyz")
    write_extxyz(p, SPECIES, cells, pos, velocities=vel, steps=np.arange(N_FRAMES))
    out["extxyz"].append((p, {}, b"%d\n" % len(SPECIES)))
    frames = [ase.Atoms(SPECIES, positions=pos[i], cell=cells[i], pbc=True)
              for i in range(N_FRAMES)]
    p = os.path.join(folder, "ase.xyz")
    ase.io.write(p, frames, format="extxyz")
    out["extxyz"].append((p, {}, b"%d\n" % len(SPECIES)))
    return out


@pytest.fixture(scope="module")
def files():
    with tempfile.TemporaryDirectory(prefix="diffkit-fuzz-") as folder:
        yield folder, _make_files(folder)


def _lines(data):
    return data.splitlines(keepends=True)


def _offset(draw, size):
    """A byte offset in ``[0, size)``, from either end (hypothesis favours small numbers)."""
    k = draw(st.integers(0, max(size - 1, 0)))
    return k if draw(st.booleans()) else max(size - 1 - k, 0)


@st.composite
def damage(draw, data):
    """Damaged bytes of ``data``: one or two cuts, flips, deletions, repeats or swaps."""
    for _ in range(draw(st.integers(1, 2))):
        kind = draw(st.sampled_from(["cut", "flip", "flip", "delete", "repeat", "swap", "swap"]))
        lines = _lines(data)
        if kind == "cut" or not lines:
            data = data[:_offset(draw, len(data) + 1)]
            continue
        if kind == "flip":
            if not data:
                continue
            i = _offset(draw, len(data))
            new = draw(st.one_of(st.integers(0, 255),
                                 st.sampled_from(list(b"0123456789.-+eE \n\tnaifx:"))))
            data = data[:i] + bytes([new]) + data[i + 1:]
            continue
        # headers (lines that are not plain rows of numbers) are picked more often
        header = [i for i, ln in enumerate(lines) if not re.fullmatch(
            rb"\s*(?:\S+\s+){0,3}[-+\d.eE\s]+", ln)]
        pool = header if header and draw(st.booleans()) else list(range(len(lines)))
        i = pool[_offset(draw, len(pool))]
        if kind == "delete":
            del lines[i]
        elif kind == "repeat":
            lines.insert(i, lines[i])
        else:
            fields = re.split(rb"(\s+)", lines[i])
            words = [k for k, f in enumerate(fields) if f and not f.isspace()]
            if len(words) >= 2:
                a, b = draw(st.lists(st.sampled_from(words), min_size=2, max_size=2,
                                     unique=True))
                fields[a], fields[b] = fields[b], fields[a]
                lines[i] = b"".join(fields)
        data = b"".join(lines)
    return data


def _boundaries(data, marker):
    """Byte offsets where frames 2, 3, ... start."""
    if marker.startswith(b"diffkit trajectory"):  # variable cell: every frame repeats the header
        starts = [m.start() for m in re.finditer(re.escape(marker), data)]
    else:
        starts = [m.start() + (0 if data[m.start():].startswith(marker) else 1)
                  for m in re.finditer(re.escape(marker), data)]
        if marker.startswith(b"Direct"):  # the header belongs to frame 1
            return starts[1:]
    return starts[1:]


def _frame_boundary_cut(original, damaged, marker):
    return any(damaged == original[:b] for b in _boundaries(original, marker))


def _check_error(exc, path):
    msg = str(exc)
    assert str(path) in msg, msg
    assert re.search(r"\b(frame|line) \d+", msg), msg


def _outcome(read, path, original, damaged, marker):
    """Run ``read``; check the outcome is a clean read or a clear InputError."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            n, positions = read()
        except InputError as exc:
            _check_error(exc, path)
            return "error"
    warned = any(issubclass(w.category, DiffkitWarning) and "cut off" in str(w.message)
                 for w in caught)
    assert np.isfinite(positions).all()
    assert n <= N_FRAMES
    if n < N_FRAMES and not warned:
        assert _frame_boundary_cut(original, damaged, marker), \
            f"{n} of {N_FRAMES} frames read without a warning"
    return "read"


def _fuzz(files, fmt, data, via):
    folder, bases = files
    path, kw, marker = data.draw(st.sampled_from(bases[fmt]), label="file")
    original = open(path, "rb").read()
    damaged = data.draw(damage(original), label="damaged")
    target = os.path.join(folder, "damaged_" + os.path.basename(path))
    with open(target, "wb") as f:
        f.write(damaged)
    if via == "raw":
        per_chunk = data.draw(st.integers(1, 4), label="frames_per_chunk")

        def read():
            raw = read_raw(target, format=fmt, frames_per_chunk=per_chunk, **kw)
            return len(raw.positions), raw.positions
    else:
        def read():
            t = diffkit.read_trajectory(target, format=fmt, frame_interval_ps=INTERVAL_PS,
                                        use_runcards=False, **kw)
            return t.n_frames, np.asarray(t.positions)
    return _outcome(read, target, original, damaged, marker)


@pytest.mark.parametrize("via", ["raw", "trajectory"])
@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_damaged_files_read_cleanly_or_fail_clearly(files, fmt, via):
    outcomes = []

    @FUZZ
    @given(data=st.data())
    def run(data):
        outcomes.append(_fuzz(files, fmt, data, via))

    run()
    # the damage must reach both kinds of outcome, or the fuzzing checks nothing
    assert outcomes.count("read") > 0 and outcomes.count("error") > 0


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_undamaged_files_read_fully(files, fmt):
    for path, kw, _ in files[1][fmt]:
        with warnings.catch_warnings():
            warnings.simplefilter("error", DiffkitWarning)
            raw = read_raw(path, format=fmt, frames_per_chunk=2, **kw)
        assert raw.positions.shape == (N_FRAMES, len(SPECIES), 3)


# ------------------------------------------------------------------ found by fuzzing
def test_xdatcar_cell_without_volume_is_an_error(files):
    """Two equal lattice vectors once passed the reader and crashed the unwrapping (a bare
    numpy LinAlgError). A cell must span a volume (common practice)."""
    folder, bases = files
    path = bases["xdatcar"][0][0]
    lines = _lines(open(path, "rb").read())
    lines[2] = lines[3]  # a = b
    target = os.path.join(folder, "flat.XDATCAR")
    with open(target, "wb") as f:
        f.write(b"".join(lines))
    with pytest.raises(InputError, match="span no volume") as exc:
        read_raw(target)
    _check_error(exc.value, target)
    assert "frame 1 (line 3)" in str(exc.value)


# ------------------------------------------------------------------ the bulk decoders
# Reference: Python's float(), which rounds a decimal string correctly (IEEE 754; the
# Python documentation, "Floating point arithmetic"). The bulk decoders must give the
# very same float64 for every number they accept, and give up on anything else.
_FIXED = st.tuples(st.integers(-9999, 99999), st.integers(0, 10 ** 8 - 1))


@SMALL
@given(rows=st.lists(st.lists(_FIXED, min_size=3, max_size=3), min_size=1, max_size=40),
       width=st.integers(15, 18), prefix=st.sampled_from([b"", b"Li"]))
def test_fixed_width_decoder_equals_float(rows, width, prefix):
    from diffkit.io._parsing import FixedWidthLayout

    def num(i, f):
        return "%d.%08d" % (i, f) if i >= 0 else "-%d.%08d" % (-i, f)

    text = [prefix + b"".join(("%*s" % (width, num(i, f))).encode() for i, f in row) + b"\n"
            for row in rows]
    layout = FixedWidthLayout(text[0], start=len(prefix))
    # by design the fast decoder takes at most 8 integer columns (leading spaces included);
    # a wider first field is left to the general parser
    int_columns = width - 9 - (1 if prefix else 0)
    assert layout.ok == (int_columns <= 8)
    if not layout.ok:
        return
    block = np.frombuffer(b"".join(text), np.uint8).reshape(len(text), -1)
    got = layout.decode(block)
    want = np.array([[float(num(i, f)) for i, f in row] for row in rows])
    np.testing.assert_array_equal(got, want)
    # one stray character anywhere in a number makes the decoder give up
    bad = bytearray(b"".join(text))
    k = len(prefix) + width - 3
    bad[k] = ord("x")
    assert layout.decode(np.frombuffer(bytes(bad), np.uint8).reshape(len(text), -1)) is None


_G = st.floats(-1e4, 1e4, allow_nan=False, allow_infinity=False)


@SMALL
@given(values=st.lists(st.tuples(st.integers(1, 10 ** 6), _G, _G, _G), min_size=1,
                       max_size=40),
       fmt=st.sampled_from(["%.10g", "%g", "%.15g", "%.17g", "%.6f", "%.3e"]))
def test_field_decoder_equals_float(values, fmt):
    from diffkit.io._parsing import decode_fields

    lines = ["%d Li %s %s %s\n" % (i, fmt % x, fmt % y, fmt % z) for i, x, y, z in values]
    got = decode_fields("".join(lines).encode(), len(lines), 5, [0, 2, 3, 4],
                        textcols=[1], dotted=[2, 3, 4])
    assert got is not None
    want = np.array([[float(w) for w in ln.split() if w != "Li"] for ln in lines])
    np.testing.assert_array_equal(got[0], want)
    assert set(got[1][0].tolist()) == {int.from_bytes(b"Li", "little")}


@pytest.mark.parametrize("token", [b"1.2.3", b"--1", b"1-2", b"nan", b"inf", b"1e", b".", b"0x1",
                                   b"1_0", b"+"])
def test_field_decoder_gives_up_on_what_is_not_a_number(token):
    from diffkit.io._parsing import decode_fields

    data = b"1 2.5 3\n2 " + token + b" 4\n"
    assert decode_fields(data, 2, 3, [0, 1, 2], dotted=[1]) is None


@pytest.mark.parametrize("fmt", ["xdatcar", "lammpsdump", "extxyz"])
def test_bulk_and_line_by_line_reading_agree(files, fmt, monkeypatch):
    """The bulk path gives exactly what the line-by-line path (checked against ASE in
    test_readers.py) gives, chunk for chunk."""
    from diffkit.io import reader_module

    mod = reader_module(fmt)
    reader = {"xdatcar": "_XdatcarReader", "lammpsdump": "_DumpReader",
              "extxyz": "_XyzReader"}[fmt]
    for path, kw, _ in files[1][fmt]:
        for per_chunk in (1, 2, 4, 1000):
            fast = list(mod.iter_chunks(path, frames_per_chunk=per_chunk, **kw))
            with monkeypatch.context() as m:
                m.setattr(getattr(mod, reader), "_bulk", lambda self, *a: ("stuck", 0))
                slow = list(mod.iter_chunks(path, frames_per_chunk=per_chunk, **kw))
            assert [len(c) for c in fast] == [len(c) for c in slow]
            for a, b in zip(fast, slow):
                for name in ("cells", "positions", "images", "steps", "times_ps", "velocities"):
                    x, y = getattr(a, name), getattr(b, name)
                    assert (x is None) == (y is None)
                    if x is not None:
                        np.testing.assert_array_equal(x, y)
