"""From files to an unwrapped Trajectory: every format, restarts, run cards, disagreements.

Outside references: the unwrapping construction of REFERENCES.md (von Bülow,
Bullerjahn & Hummer 2020) — a continuous path wrapped and written to each
format must come back within 1e-6 Å, and a path of known increments in a
changing cell must come back as the sum of the increments.
"""

import warnings

import numpy as np
import pytest

import diffkit
from diffkit.errors import DiffkitWarning, InputError
from diffkit.io.runcard import write_runcard
from diffkit.io.write import write_extxyz, write_lammps_dump, write_xdatcar
from diffkit.unwrap import wrap_into_cells

SPECIES = ["Li"] * 6 + ["S"] * 4


def _path(n_frames=120, seed=0, cell=None, step=0.25):
    rng = np.random.default_rng(seed)
    cell = np.diag([7.0, 7.5, 8.0]) if cell is None else cell
    inc = rng.normal(0, step, (n_frames, len(SPECIES), 3))
    inc[0] = 0
    start = rng.random((len(SPECIES), 3)) @ cell
    return np.broadcast_to(cell, (n_frames, 3, 3)).copy(), start + np.cumsum(inc, axis=0)


def _write(fmt, path, cells, pos, *, kind="wrapped", times=None, steps=None):
    if fmt == "xdatcar":
        write_xdatcar(path, SPECIES, cells, wrap_into_cells(pos, cells))
    elif fmt == "extxyz":
        write_extxyz(path, SPECIES, cells, pos if kind == "unwrapped" else wrap_into_cells(pos, cells),
                     times_ps=times, unwrapped=kind == "unwrapped")
    else:
        write_lammps_dump(path, SPECIES, cells, pos,
                          steps=np.arange(len(pos)) * 10 if steps is None else steps, kind=kind)


@pytest.mark.parametrize("fmt,kind", [("xdatcar", "wrapped"), ("extxyz", "wrapped"),
                                      ("lammpsdump", "wrapped"), ("lammpsdump", "unwrapped"),
                                      ("lammpsdump", "wrapped+images"), ("lammpsdump", "scaled")])
def test_continuous_path_comes_back_from_every_format(tmp_path, fmt, kind):
    cells, pos = _path(cell=np.array([[7.0, 0, 0], [1.2, 7.5, 0], [-0.8, 0.6, 8.0]]))
    f = tmp_path / f"run.{fmt}.gz"
    _write(fmt, f, cells, pos, kind=kind)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiffkitWarning)  # LAMMPS unit style assumed
        t = diffkit.read_trajectory(f, format=fmt, frame_interval_ps=0.05, temperature_K=800)
    # the unwrapped path equals the original up to one lattice translation
    shift = t.positions[0] - pos[0]
    frac = shift @ np.linalg.inv(cells[0])
    np.testing.assert_allclose(frac, np.round(frac), atol=1e-6)
    np.testing.assert_allclose(t.positions - t.positions[0], pos - pos[0], atol=1e-6)
    assert t.frame_interval_ps == pytest.approx(0.05) and t.temperature_K == 800
    assert t.provenance["sources"][0]["sha256"]


def test_changing_cell_from_xdatcar_gives_sum_of_increments(tmp_path):
    rng = np.random.default_rng(3)
    n = 150
    base = np.array([[7.0, 0, 0], [1.0, 7.5, 0], [-0.5, 0.4, 8.0]])
    cells = base[None] * (1 + 0.04 * np.sin(np.arange(n) / 7.0))[:, None, None]
    inc = rng.normal(0, 0.3, (n, len(SPECIES), 3))
    inc[0] = 0
    wrapped = np.empty((n, len(SPECIES), 3))
    wrapped[0] = rng.random((len(SPECIES), 3)) @ cells[0]
    for i in range(1, n):  # each new position wrapped into that frame's cell
        wrapped[i] = wrap_into_cells((wrapped[i - 1] + inc[i])[None], cells[i:i + 1])[0]
    write_xdatcar(tmp_path / "XDATCAR", SPECIES, cells, wrapped)
    t = diffkit.read_trajectory(tmp_path / "XDATCAR", frame_interval_ps=0.02)
    np.testing.assert_allclose(t.positions - t.positions[0], np.cumsum(inc, axis=0), atol=1e-6)


def test_restart_with_repeated_frame_is_one_run(tmp_path):
    cells, pos = _path(200)
    _write("lammpsdump", tmp_path / "a.dump", cells[:101], pos[:101], kind="unwrapped",
           steps=np.arange(101) * 10)
    # the restart repeats frame 100 (step 1000) and continues
    _write("lammpsdump", tmp_path / "b.dump", cells[100:], pos[100:], kind="wrapped",
           steps=np.arange(100, 200) * 10)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DiffkitWarning)
        t = diffkit.read_trajectory([tmp_path / "a.dump", tmp_path / "b.dump"], md_timestep_ps=0.002)
    assert t.n_frames == 200
    np.testing.assert_allclose(t.times_ps, np.arange(200) * 0.02)
    np.testing.assert_allclose(t.positions - t.positions[0], pos - pos[0], atol=1e-6)
    assert any("repeat" in n for n in t.provenance["notes"])


def test_restart_without_clock_drops_identical_frame(tmp_path):
    cells, pos = _path(80)
    _write("xdatcar", tmp_path / "XDATCAR.1", cells[:41], pos[:41])
    _write("xdatcar", tmp_path / "XDATCAR.2", cells[40:], pos[40:])
    t = diffkit.read_trajectory([tmp_path / "XDATCAR.1", tmp_path / "XDATCAR.2"],
                                format="xdatcar", frame_interval_ps=0.01)
    assert t.n_frames == 80
    np.testing.assert_allclose(t.positions - t.positions[0], pos - pos[0], atol=1e-6)


def test_files_that_do_not_continue_are_refused(tmp_path):
    cells, pos = _path(60)
    _, other = _path(60, seed=9)
    _write("xdatcar", tmp_path / "XDATCAR.1", cells[:30], pos[:30])
    _write("xdatcar", tmp_path / "XDATCAR.2", cells[30:], other[30:])
    with pytest.raises(InputError, match=r"XDATCAR\.2: frame 1, atom \d+ is .* consecutive parts"):
        diffkit.read_trajectory([tmp_path / "XDATCAR.1", tmp_path / "XDATCAR.2"],
                                format="xdatcar", frame_interval_ps=0.01)


def test_change_of_frame_interval_is_an_error_unless_resampled(tmp_path):
    cells, pos = _path(121, step=0.1)
    times = np.arange(121) * 0.01
    _write("extxyz", tmp_path / "a.extxyz", cells[:61:2], pos[:61:2], times=times[:61:2])
    _write("extxyz", tmp_path / "b.extxyz", cells[61:], pos[61:], times=times[61:])
    files = [tmp_path / "a.extxyz", tmp_path / "b.extxyz"]
    with pytest.raises(InputError, match=r"b\.extxyz: .*0\.01 ps apart .*0\.02 ps.*resample"):
        diffkit.read_trajectory(files)
    t = diffkit.read_trajectory(files, resample=True)
    np.testing.assert_allclose(t.times_ps, times[::2])
    np.testing.assert_allclose(t.positions - t.positions[0], pos[::2] - pos[0], atol=1e-6)


def test_missing_frame_interval_says_how_to_give_it(tmp_path):
    cells, pos = _path(10)
    _write("xdatcar", tmp_path / "XDATCAR", cells, pos)
    with pytest.raises(InputError, match=r"XDATCAR: the time between saved frames is unknown; "
                                         r"give it with --frame-interval"):
        diffkit.read_trajectory(tmp_path / "XDATCAR")


@pytest.mark.parametrize("bad", [0.0, -0.02])
def test_non_positive_frame_interval_refused(tmp_path, bad):
    with pytest.raises(InputError, match="frame_interval_ps must be a positive number"):
        diffkit.read_trajectory(tmp_path / "XDATCAR", frame_interval_ps=bad)


def test_runcard_supplies_interval_and_temperature(tmp_path):
    cells, pos = _path(20)
    _write("xdatcar", tmp_path / "XDATCAR", cells, pos)
    write_runcard(tmp_path / "XDATCAR.runcard.toml", frame_interval="25fs", temperature="700K",
                  start="0.1ps")
    t = diffkit.read_trajectory(tmp_path / "XDATCAR")
    assert t.frame_interval_ps == pytest.approx(0.025) and t.temperature_K == 700
    assert t.n_frames == 16  # 0.1 ps = 4 frames dropped
    assert t.provenance["runcards"]


def test_file_and_user_disagree_on_interval_and_temperature(tmp_path):
    cells, pos = _path(20)
    f = tmp_path / "run.extxyz"
    _write("extxyz", f, cells, pos, times=np.arange(20) * 0.01)
    with pytest.raises(InputError, match=r"run\.extxyz: the file's frames are 0\.01 ps apart .* "
                                         r"0\.02 ps was given; pass override=True"):
        diffkit.read_trajectory(f, frame_interval_ps=0.02)
    t = diffkit.read_trajectory(f, frame_interval_ps=0.02, override=True)
    assert t.frame_interval_ps == pytest.approx(0.02)
    assert any("overrides" in n for n in t.provenance["notes"])


def test_start_dropping_everything_is_an_error(tmp_path):
    cells, pos = _path(10)
    _write("xdatcar", tmp_path / "XDATCAR", cells, pos)
    with pytest.raises(InputError, match="no frames left after dropping the first 5 ps"):
        diffkit.read_trajectory(tmp_path / "XDATCAR", frame_interval_ps=0.01, start_ps=5.0)


def test_ingest_streams_to_an_equal_run_file(tmp_path):
    cells, pos = _path(300)
    _write("xdatcar", tmp_path / "XDATCAR", cells, pos)
    t = diffkit.read_trajectory(tmp_path / "XDATCAR", frame_interval_ps=0.01, temperature_K=600)
    from diffkit.io.assemble import ReadOptions

    out = diffkit.ingest(tmp_path / "XDATCAR", tmp_path / "run.h5",
                         ReadOptions(frame_interval_ps=0.01, temperature_K=600, frames_per_chunk=7))
    back = diffkit.open_run(out)
    assert back.is_lazy and back.n_frames == t.n_frames and list(back.species) == list(t.species)
    # chunked accumulation may differ from one-shot in the last bits only
    np.testing.assert_allclose(back.positions, t.positions, rtol=0, atol=1e-12)
    np.testing.assert_allclose(back.times_ps, t.times_ps, rtol=1e-14)
    for s in t.symbols:
        np.testing.assert_allclose(back.com_tracks[s], t.com_tracks[s], atol=1e-12)


def test_unknown_format_lists_known_ones(tmp_path):
    f = tmp_path / "notes.txt"
    f.write_text("hello\nworld\n")
    with pytest.raises(InputError, match=r"notes\.txt: cannot tell the file format .*xdatcar, "
                                         r"lammpsdump, extxyz"):
        diffkit.read_trajectory(f, frame_interval_ps=0.01)


def test_inputs_are_never_modified(tmp_path):
    cells, pos = _path(30)
    f = tmp_path / "XDATCAR"
    _write("xdatcar", f, cells, pos)
    before = f.read_bytes()
    diffkit.read_trajectory(f, frame_interval_ps=0.01)
    with pytest.raises(InputError):
        diffkit.read_trajectory(f, frame_interval_ps=0.01, start_ps=100)
    assert f.read_bytes() == before
