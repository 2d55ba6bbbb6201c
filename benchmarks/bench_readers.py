"""Benchmark: trajectory reading speed of diffkit's readers against ASE's, same run, same files.

Generates three trajectories of one random walk (200 atoms x 20,000 frames by
default, ~120-220 MB each) with ``diffkit.io.write``: a VASP XDATCAR (constant
cell), a LAMMPS text dump (``id type element xu yu zu``, ``%.10g``, atoms in id
order as ``dump_modify sort id`` writes them) and an extended XYZ file (as
ASE writes it: ``%16.8f`` columns, a time on each comment line). For each it
prints, measured in this run:

* diffkit's parse throughput in MB/s (``diffkit.io.read_raw`` on the whole
  file: text to frames in Å, the work ``ase.io.read`` does);
* ASE's throughput (``ase.io.read(path, index=":")``). ASE takes minutes on
  the whole files, so it reads a **leading part** of each (the first
  ``--ase-frames`` frames, a file of its own written from the same data) and
  its MB/s is taken from that; diffkit is timed on the same part as well;
* the ratio diffkit / ASE, from wall-clock time and from CPU time (process
  time, which is less disturbed by other jobs on a shared machine).

LAMMPS dumps are decoded by pyarrow's CSV reader when pyarrow is installed
(a dependency); the script then also times the numpy decoder on the same
file (row ``lammpsdump/numpy``), the path taken without pyarrow. The line
"decoded by" says which path each LAMMPS row took. ``DIFFKIT_READ_THREADS=2``
(environment) lets two threads decode.

Usage::

    python benchmarks/bench_readers.py                  # 200 atoms x 20,000 frames
    python benchmarks/bench_readers.py --frames 4000    # a quicker run

The files go to a temporary folder that is deleted afterwards.
Goals (issue "Step 3"): >= 20x ASE on XDATCAR and extended XYZ, >= 8x on LAMMPS dumps.
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
import time
import warnings

import numpy as np

FORMATS = ("xdatcar", "lammpsdump", "extxyz")
NAMES = {"xdatcar": "XDATCAR", "lammpsdump": "run.lammpstrj", "extxyz": "run.extxyz"}
ASE_FORMATS = {"xdatcar": "vasp-xdatcar", "lammpsdump": "lammps-dump-text", "extxyz": "extxyz"}


def random_walk(n_atoms, n_frames, seed=0, step=0.05):
    """Species, a cubic-ish cell (Å) and an unwrapped random walk (n_frames, n_atoms, 3) Å."""
    rng = np.random.default_rng(seed)
    n_li = int(0.6 * n_atoms)
    n_p = int(0.1 * n_atoms)
    species = ["Li"] * n_li + ["P"] * n_p + ["S"] * (n_atoms - n_li - n_p)
    cell = np.diag([14.0, 14.5, 15.0]) * (n_atoms / 200.0) ** (1 / 3)
    start = rng.random((n_atoms, 3)) @ cell
    pos = np.empty((n_frames, n_atoms, 3))
    pos[0] = start
    block = 2000
    for a in range(1, n_frames, block):  # cumulative sum in blocks (bounded temporaries)
        b = min(n_frames, a + block)
        steps = rng.normal(scale=step, size=(b - a, n_atoms, 3))
        pos[a:b] = pos[a - 1] + np.cumsum(steps, axis=0)
    return species, cell, pos


def write(fmt, path, species, cell, pos, frame_interval_ps=0.01):
    from diffkit.io.write import write_extxyz, write_lammps_dump, write_xdatcar

    n_frames = len(pos)
    if fmt == "xdatcar":
        write_xdatcar(path, species, cell, pos)
    elif fmt == "lammpsdump":
        write_lammps_dump(path, species, cell, pos, steps=np.arange(n_frames) * 10)
    else:
        write_extxyz(path, species, cell, pos, times_ps=np.arange(n_frames) * frame_interval_ps)


def timed(fn, repeat):
    """Best (wall, cpu) seconds over ``repeat`` calls, and the last result."""
    best_wall = best_cpu = float("inf")
    out = None
    for _ in range(repeat):
        w, c = time.perf_counter(), time.process_time()
        out = fn()
        best_wall = min(best_wall, time.perf_counter() - w)
        best_cpu = min(best_cpu, time.process_time() - c)
    return best_wall, best_cpu, out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--atoms", type=int, default=200)
    ap.add_argument("--frames", type=int, default=20000)
    ap.add_argument("--ase-frames", type=int, default=2000,
                    help="frames of the leading part that ASE reads (default 2000)")
    ap.add_argument("--repeat", type=int, default=2, help="timings per case; the best is kept")
    ap.add_argument("--formats", default=",".join(FORMATS))
    args = ap.parse_args(argv)

    import ase.io

    from diffkit.io import _parsing, read_raw

    formats = [f for f in args.formats.split(",") if f]
    ase_frames = min(args.ase_frames, args.frames)
    species, cell, pos = random_walk(args.atoms, args.frames)
    tmp = tempfile.mkdtemp(prefix="diffkit-bench-readers-")
    rows = []
    try:
        for fmt in formats:
            full = os.path.join(tmp, NAMES[fmt])
            part = os.path.join(tmp, "part_" + NAMES[fmt])
            t = time.perf_counter()
            write(fmt, full, species, cell, pos)
            write(fmt, part, species, cell, pos[:ase_frames])
            mb_full = os.path.getsize(full) / 1e6
            mb_part = os.path.getsize(part) / 1e6
            print(f"{fmt}: wrote {mb_full:.0f} MB ({args.frames} frames) and a {mb_part:.0f} MB "
                  f"leading part ({ase_frames} frames) in {time.perf_counter() - t:.0f} s",
                  flush=True)
            kw = {"units": "metal"} if fmt == "lammpsdump" else {}
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                dk_w, dk_c, raw = timed(lambda: read_raw(full, format=fmt, **kw), args.repeat)
                assert raw.positions.shape == (args.frames, args.atoms, 3)
                dkp_w, dkp_c, _ = timed(lambda: read_raw(part, format=fmt, **kw), args.repeat)
                ase_w, ase_c, images = timed(
                    lambda: ase.io.read(part, index=":", format=ASE_FORMATS[fmt]), 2)
                extra = []
                if fmt == "lammpsdump" and _parsing.fast_parse_available():
                    _parsing.FAST_PARSE = False  # the numpy decoder, as without pyarrow
                    try:
                        np_w, np_c, slow = timed(lambda: read_raw(full, format=fmt, **kw),
                                                 args.repeat)
                        npp_w, _, _ = timed(lambda: read_raw(part, format=fmt, **kw),
                                            args.repeat)
                    finally:
                        _parsing.FAST_PARSE = True
                    assert np.array_equal(slow.positions, raw.positions)  # bit for bit
                    del slow
                    extra.append(("lammpsdump/numpy", mb_full, mb_full / np_w, mb_full / np_c,
                                  mb_part / npp_w, mb_part / ase_w, mb_part / ase_c))
            # the same numbers as ASE's (a sanity check, not the benchmark's point)
            ref = np.array([a.positions for a in images])
            got = read_raw(part, format=fmt, **kw).positions
            lat = np.array([a.cell[:] for a in images])
            frac = np.einsum("fni,fij->fnj", ref - got, np.linalg.inv(lat))
            assert np.abs(frac - np.round(frac)).max() < 1e-6
            del raw, images
            rows.append((fmt, mb_full, mb_full / dk_w, mb_full / dk_c, mb_part / dkp_w,
                         mb_part / ase_w, mb_part / ase_c))
            rows.extend(extra)
            os.unlink(full)
            os.unlink(part)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

    print()
    print(f"{args.atoms} atoms x {args.frames} frames; ASE read the first {ase_frames} frames "
          "(a file of their own); MB/s = file size / time")
    fast = "pyarrow's CSV reader" if _parsing.fast_parse_available() else \
        "the numpy decoder (pyarrow not installed or DIFFKIT_FAST_PARSE=0)"
    print(f"LAMMPS atom lines decoded by {fast}; pyarrow's own threads "
          f"{'on' if _parsing.FAST_THREADS else 'off'}; numpy decoding threads: {_parsing.THREADS}")
    head = (f"{'format':<16} {'size MB':>8} {'diffkit MB/s':>13} {'(cpu)':>7} "
            f"{'diffkit on part':>16} {'ASE MB/s':>9} {'(cpu)':>7} {'ratio wall':>11} "
            f"{'ratio cpu':>10}")
    print(head)
    print("-" * len(head))
    goals = {"xdatcar": 20, "lammpsdump": 8, "lammpsdump/numpy": 8, "extxyz": 20}
    for fmt, mb, dk_w, dk_c, dkp_w, ase_w, ase_c in rows:
        print(f"{fmt:<16} {mb:8.0f} {dk_w:13.1f} {dk_c:7.1f} {dkp_w:16.1f} {ase_w:9.1f} "
              f"{ase_c:7.1f} {dk_w / ase_w:10.1f}x {dk_c / ase_c:9.1f}x   "
              f"(goal >= {goals[fmt]}x)")


if __name__ == "__main__":
    main()
