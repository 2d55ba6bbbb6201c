"""The LAMMPS reader's fast path (pyarrow's CSV reader) against its numpy path, Python and ASE.

The atom lines of a LAMMPS dump are decoded by pyarrow when it is installed
(a dependency), by diffkit's numpy decoder otherwise, and line by line
where either gives up. All three must give the very same float64 numbers and
the very same error messages. References: Python's ``float`` (correctly
rounded decimal conversion, IEEE 754; the Python documentation, "Floating point
arithmetic") for single numbers, ``ase.io.read`` ("lammps-dump-text", ASE's own
parser) within 1e-6 Å for whole files; the numpy path is itself checked
against ASE in test_readers.py.

These tests need pyarrow (the ``fast`` extra); without it they are skipped and
the numpy path is what test_readers.py and test_reader_fuzz.py check.
"""

from __future__ import annotations

import re
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

pytest.importorskip("pyarrow", reason="the fast path needs pyarrow (a dependency of diffkit)")

import ase.io  # noqa: E402

from _files import CUBIC, SPECIES, TRICLINIC, max_diff_modulo_cell, random_walk  # noqa: E402
from diffkit.errors import DiffkitWarning, InputError  # noqa: E402
from diffkit.io import _parsing, lammpsdump  # noqa: E402
from diffkit.io.write import write_lammps_dump  # noqa: E402

N_FRAMES = 7


@pytest.fixture(autouse=True)
def fast_parse_on(monkeypatch):
    """The fast path on (whatever DIFFKIT_FAST_PARSE says), for blocks of any size."""
    monkeypatch.setattr(_parsing, "FAST_PARSE", True)
    monkeypatch.setattr(_parsing, "FAST_MIN_BYTES", 0)


FIELDS = ("cells", "positions", "images", "steps", "times_ps", "velocities")


class Paths:
    """Switch between the fast, numpy and line-by-line paths; count what the fast path decoded."""

    def __init__(self, monkeypatch):
        self.mp = monkeypatch
        self.fast_blocks = 0
        real = lammpsdump.decode_spaced_fields

        def counting(*a, **kw):
            got = real(*a, **kw)
            self.fast_blocks += got is not None
            return got

        monkeypatch.setattr(lammpsdump, "decode_spaced_fields", counting)

    def use(self, path):
        self.mp.setattr(_parsing, "FAST_MIN_BYTES", 0)  # small test files too
        self.mp.setattr(_parsing, "FAST_PARSE", path == "fast")
        if path == "careful":
            self.mp.setattr(lammpsdump._DumpReader, "_bulk", lambda self, *a: ("stuck", 0))
        else:
            self.mp.setattr(lammpsdump._DumpReader, "_bulk", _BULK)


_BULK = lammpsdump._DumpReader._bulk


@pytest.fixture
def paths(monkeypatch):
    return Paths(monkeypatch)


def read_chunks(path, per_chunk=1000, **kw):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiffkitWarning)
        return list(lammpsdump.iter_chunks(path, frames_per_chunk=per_chunk, **kw))


def assert_same_chunks(a, b):
    assert [len(c) for c in a] == [len(c) for c in b]
    for x, y in zip(a, b):
        assert x.species == y.species and x.kind == y.kind
        for name in FIELDS:
            u, v = getattr(x, name), getattr(y, name)
            assert (u is None) == (v is None), name
            if u is not None:
                np.testing.assert_array_equal(u, v, err_msg=name)  # bit for bit


def _respace(path, how):
    """Rewrite the atom lines of a dump: a space at the end, CRLF, or aligned columns."""
    out = []
    for line in path.read_bytes().splitlines(keepends=True):
        if line[:1].isdigit() and b" " in line.strip():
            if how == "trailing space":
                line = line[:-1] + b" \n"
            elif how == "aligned":
                line = b" ".join(w.rjust(14) for w in line.split()) + b"\n"
        if how == "crlf":
            line = line[:-1] + b"\r\n"
        out.append(line)
    path.write_bytes(b"".join(out))


LAYOUTS = {
    "sorted, element": dict(kind="unwrapped"),
    "shuffled, images, velocities": dict(kind="wrapped+images", velocities=True,
                                         shuffle_seed=3),
    "scaled, type map": dict(kind="scaled", element_column=False),
    "scaled unwrapped, real units": dict(kind="scaled-unwrapped", velocities=True, units="real"),
}


def _write(tmp_path, layout, cell=TRICLINIC, name="run.lammpstrj"):
    opts = dict(LAYOUTS[layout])
    cells, pos, vel = random_walk(n_frames=N_FRAMES, cell=cell, seed=5)
    if opts.pop("velocities", False):
        opts["velocities"] = vel
    path = tmp_path / name
    write_lammps_dump(path, SPECIES, cells, pos, steps=np.arange(N_FRAMES) * 20, **opts)
    kw = {"units": opts.get("units", "metal")}
    if not opts.get("element_column", True):
        kw["type_map"] = {1: "Li", 2: "P", 3: "S"}
    return path, kw


# ------------------------------------------------------------------ whole files
@pytest.mark.parametrize("layout", list(LAYOUTS))
@pytest.mark.parametrize("cell", [CUBIC, TRICLINIC], ids=["orthogonal", "triclinic"])
@pytest.mark.parametrize("spacing", ["single", "trailing space", "crlf"])
def test_fast_numpy_and_careful_paths_agree(tmp_path, paths, layout, cell, spacing):
    path, kw = _write(tmp_path, layout, cell)
    if spacing != "single":
        _respace(path, spacing)
    for per_chunk in (1, 3, 1000):
        got = {}
        for which in ("fast", "numpy", "careful"):
            paths.use(which)
            got[which] = read_chunks(path, per_chunk, **kw)
        assert paths.fast_blocks > 0  # the fast path did decode these frames
        assert_same_chunks(got["fast"], got["numpy"])
        assert_same_chunks(got["fast"], got["careful"])


@pytest.mark.parametrize("layout", ["sorted, element", "shuffled, images, velocities"])
def test_fast_path_equals_ase(tmp_path, paths, layout):
    path, kw = _write(tmp_path, layout)
    paths.use("fast")
    chunks = read_chunks(path, **kw)
    assert paths.fast_blocks > 0
    images = ase.io.read(path, index=":", format="lammps-dump-text")  # ASE is the reference
    ref_cells = np.array([a.cell[:] for a in images])
    ref_pos = np.array([a.positions for a in images])
    np.testing.assert_allclose(chunks[0].cells, ref_cells, atol=1e-6)
    assert max_diff_modulo_cell(chunks[0].positions, ref_pos, ref_cells) < 1e-6
    assert chunks[0].species == tuple(images[0].get_chemical_symbols())


def test_aligned_columns_fall_back_to_numpy(tmp_path, paths):
    """Columns padded with several spaces are not for pyarrow (an empty field between two
    spaces); the numpy decoder reads them, and the reader stops asking pyarrow."""
    path, kw = _write(tmp_path, "sorted, element")
    _respace(path, "aligned")
    paths.use("numpy")
    want = read_chunks(path, 3, **kw)
    paths.use("fast")
    got = read_chunks(path, 3, **kw)
    assert paths.fast_blocks == 0
    assert_same_chunks(got, want)


# ------------------------------------------------------------------ bad input, same messages
def _lines(path):
    return path.read_bytes().splitlines(keepends=True)


def _damage_line(lines, index, new):
    lines = list(lines)
    lines[index] = new
    return lines


# (what, function of the file's lines -> damaged lines); the atom lines of frame 2 are
# 26..33, those of frame 4 60..67
def _last_field(line, new):
    return b" ".join(line.split()[:-1] + [new]) + b"\n"


def _element(line, new):
    return re.sub(rb" (Li|P|S) ", b" " + new + b" ", line)


DAMAGES = {
    "text for a number": lambda ln: _damage_line(ln, 61, _last_field(ln[61], b"1.2q")),
    "NaN coordinate": lambda ln: _damage_line(ln, 62, _last_field(ln[62], b"nan")),
    "inf coordinate": lambda ln: _damage_line(ln, 63, _last_field(ln[63], b"-inf")),
    "missing atom line": lambda ln: ln[:61] + ln[62:],
    "extra atom line": lambda ln: ln[:61] + [ln[61]] + ln[61:],
    "short atom line": lambda ln: _damage_line(ln, 64, b" ".join(ln[64].split()[:-1]) + b"\n"),
    "long atom line": lambda ln: _damage_line(ln, 64, ln[64][:-1] + b" 7\n"),
    # element names are compared in the first chunk only (later, the types are): frame 2
    "unknown element": lambda ln: _damage_line(ln, 31, _element(ln[31], b"Qx")),
    "non-ASCII element": lambda ln: _damage_line(ln, 31, _element(ln[31], "Sü".encode())),
    "changed type": lambda ln: _damage_line(ln, 60, re.sub(rb"^(\d+) \d+", rb"\1 9", ln[60])),
    "duplicated id": lambda ln: _damage_line(ln, 61, re.sub(rb"^\d+", b"1", ln[61])),
    "fractional id": lambda ln: _damage_line(ln, 61, re.sub(rb"^(\d+)", rb"\1.5", ln[61])),
    "blank line between frames": lambda ln: ln[:68] + [b"\n"] + ln[68:],
    "space before a line": lambda ln: _damage_line(ln, 62, b" " + ln[62]),
    "tab between fields": lambda ln: _damage_line(ln, 62, ln[62].replace(b" ", b"\t", 2)),
    "lone carriage return": lambda ln: _damage_line(ln, 62, ln[62].replace(b" ", b"\r", 1)),
    "cut mid-line": lambda ln: ln[:-3] + [ln[-3][:5]],
}


#: damages the reader takes in its stride (extra fields, blanks between frames, other
#: whitespace, a cut-off last frame dropped with a warning); the others are errors
HARMLESS = {"long atom line", "blank line between frames", "space before a line",
            "tab between fields", "cut mid-line"}


def _outcome(path, kw):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            chunks = list(lammpsdump.iter_chunks(path, frames_per_chunk=2, **kw))
        except InputError as exc:
            return "error", str(exc)
    notes = sorted(str(w.message) for w in caught if issubclass(w.category, DiffkitWarning))
    return "read", chunks, notes


@pytest.mark.parametrize("damage", list(DAMAGES))
def test_bad_input_gives_the_same_outcome_on_every_path(tmp_path, paths, damage):
    path, kw = _write(tmp_path, "sorted, element")
    assert _lines(path)[59].startswith(b"ITEM: ATOMS")  # frame 4's atom lines follow
    path.write_bytes(b"".join(DAMAGES[damage](_lines(path))))
    outcomes = {}
    for which in ("fast", "numpy", "careful"):
        paths.use(which)
        outcomes[which] = _outcome(path, kw)
    if damage != "non-ASCII element":  # pyarrow refuses the chunk with that name
        assert paths.fast_blocks > 0  # frame 2 (or 3), undamaged, went through pyarrow
    fast = outcomes["fast"]
    assert fast[0] == ("read" if damage in HARMLESS else "error"), fast
    for which in ("numpy", "careful"):
        other = outcomes[which]
        assert fast[0] == other[0], (which, fast, other)
        if fast[0] == "error":
            assert fast[1] == other[1]
        else:
            assert_same_chunks(fast[1], other[1])
            assert fast[2] == other[2]
    if fast[0] == "error":  # names the file and the frame (and line)
        assert str(path) in fast[1] and re.search(r"\bframe \d+ \(line \d+\)", fast[1])


# ------------------------------------------------------------------ fuzzing: fast == numpy
@st.composite
def damaged(draw, data):
    """``data`` with one or two cuts, byte flips, deleted, repeated or swapped lines."""
    for _ in range(draw(st.integers(1, 2))):
        lines = data.splitlines(keepends=True)
        kind = draw(st.sampled_from(["cut", "flip", "flip", "delete", "repeat", "swap"]))
        if kind == "cut" or not lines:
            data = data[:draw(st.integers(0, len(data)))]
        elif kind == "flip":
            i = draw(st.integers(0, len(data) - 1))
            new = draw(st.one_of(st.integers(0, 255),
                                 st.sampled_from(list(b"0123456789.-+eE \n\t\rnaix"))))
            data = data[:i] + bytes([new]) + data[i + 1:]
        else:
            i = draw(st.integers(0, len(lines) - 1))
            if kind == "delete":
                del lines[i]
            elif kind == "repeat":
                lines.insert(i, lines[i])
            else:
                j = draw(st.integers(0, len(lines) - 1))
                lines[i], lines[j] = lines[j], lines[i]
            data = b"".join(lines)
    return data


@pytest.mark.parametrize("layout", ["sorted, element", "shuffled, images, velocities"])
def test_damaged_dumps_give_the_same_outcome_fast_and_numpy(tmp_path, monkeypatch, layout):
    path, kw = _write(tmp_path, layout)
    original = path.read_bytes()
    target = tmp_path / "damaged.lammpstrj"
    seen = set()

    @settings(max_examples=200, deadline=None, derandomize=True, database=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
    @given(data=damaged(original))
    def run(data):
        target.write_bytes(data)
        with monkeypatch.context() as m:
            got = {}
            for which in ("fast", "numpy"):
                m.setattr(_parsing, "FAST_MIN_BYTES", 0)
                m.setattr(_parsing, "FAST_PARSE", which == "fast")
                got[which] = _outcome(target, kw)
        fast, slow = got["fast"], got["numpy"]
        assert fast[0] == slow[0], (fast, slow)
        seen.add(fast[0])
        if fast[0] == "error":
            assert fast[1] == slow[1]
        else:
            assert_same_chunks(fast[1], slow[1])
            assert fast[2] == slow[2]

    run()
    assert seen == {"read", "error"}  # the damage reached both outcomes


# ------------------------------------------------------------------ the decoder itself
_G = st.floats(-1e5, 1e5, allow_nan=False, allow_infinity=False)


@settings(max_examples=80, deadline=None, derandomize=True, database=None)
@given(values=st.lists(st.tuples(st.integers(1, 10 ** 9), _G, _G, _G), min_size=1,
                       max_size=60),
       fmt=st.sampled_from(["%.10g", "%g", "%.15g", "%.17g", "%.6f", "%.3e", "%.20e", "%r"]),
       trailing=st.booleans())
def test_fast_decoder_equals_float(values, fmt, trailing):
    lines = ["%d Li %s %s %s%s\n" % (i, fmt % x, fmt % y, fmt % z, " " if trailing else "")
             for i, x, y, z in values]
    got = _parsing.decode_spaced_fields("".join(lines).encode(), len(lines), 5, [0, 2, 3, 4],
                                        textcols=[1])
    assert got is not None
    want = np.array([[float(w) for w in ln.split() if w != "Li"] for ln in lines])
    np.testing.assert_array_equal(got[0], want)  # Python's float, bit for bit
    assert set(got[1][0].tolist()) == {int.from_bytes(b"Li", "little")}


GOOD = b"1 Li 2.5 3\n2 S -0.5 4e-3\n"


@pytest.mark.parametrize("data", [
    b"1 Li 2.5 3\n2 S 1.2.3 4\n", b"1 Li 2.5 3\n2 S --1 4\n", b"1 Li 2.5 3\n2 S nan 4\n",
    b"1 Li 2.5 3\n2 S inf 4\n", b"1 Li 2.5 3\n2 S 1e 4\n", b"1 Li 2.5 3\n2 S 0x1 4\n",
    b"1 Li 2.5 3\n2 S 1_0 4\n", b"1 Li 2.5 3\n2 S + 4\n",
    b"1 Li 2.5 3\n2 S  -0.5 4\n",      # two spaces: an empty field
    b"1 Li 2.5 3\n 2 S -0.5 4\n",      # a space before the line
    b"1 Li 2.5 3\n2 S -0.5\n",         # short line
    b"1 Li 2.5 3\n2 S -0.5 4 5\n",     # long line
    b"1 Li 2.5 3\n\n",                 # blank line
    b"1 Li 2.5 3\r2 S -0.5 4\n",       # a lone carriage return
    b"1 Li 2.5 3\n2 S\t-0.5 4\n",      # a tab inside a field
    "1 Li 2.5 3\n2 Sü -0.5 4\n".encode(), b"1 Li 2.5 3\n2 Sulphurous -0.5 4\n",
    b"1 Li 2.5 3\n2 S -0.5 4",         # no newline at the end
], ids=lambda d: repr(d[11:])[:30])
def test_fast_decoder_gives_up_on_anything_else(data):
    assert _parsing.decode_spaced_fields(GOOD, 2, 4, [0, 2, 3], textcols=[1]) is not None
    assert _parsing.decode_spaced_fields(data, 2, 4, [0, 2, 3], textcols=[1]) is None


def test_fast_decoder_checks_the_lines_of_each_frame():
    data = b"1 2.5\n2 3.5\n1 4.5\n2 5.5\n"
    ends = np.array([12, 24])
    got = _parsing.decode_spaced_fields(data, 4, 2, [0, 1], lines_per_frame=2, frame_ends=ends)
    np.testing.assert_array_equal(got[0], [[1, 2.5], [2, 3.5], [1, 4.5], [2, 5.5]])
    # three lines in the first frame and one in the second: same lines in all, wrong frames
    assert _parsing.decode_spaced_fields(data, 4, 2, [0, 1], lines_per_frame=2,
                                         frame_ends=np.array([18, 24])) is None


def test_fast_path_can_be_turned_off(monkeypatch):
    monkeypatch.setattr(_parsing, "FAST_PARSE", False)
    assert not _parsing.fast_parse_available()
    assert _parsing.decode_spaced_fields(GOOD, 2, 4, [0, 2, 3], textcols=[1]) is None
