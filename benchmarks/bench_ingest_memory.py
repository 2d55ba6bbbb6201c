"""Benchmark: peak memory of ``diffkit.ingest`` on text trajectories far larger than memory.

Writes a VASP XDATCAR of ``--size-gb`` gigabytes (2 GB by default: 200 atoms,
~270,000 frames) and a copy of its first quarter, then ingests each into an
HDF5 run file in a fresh child process and prints, per run: frames, text size,
run-file size, wall time and the child's **peak resident memory** (VmHWM from
``/proc/self/status``, cross-checked with ``getrusage(RUSAGE_CHILDREN)``).
A child that only imports diffkit, numpy and h5py gives the floor. Each
file is ingested a second time under ``tracemalloc`` to show the peak of the
memory numpy and Python ask for, which does not depend on how the C allocator
hands memory back (RSS moves by a few per cent from run to run for that reason).

Goals (issue "Step 3"): peak RSS under 500 MB for the >= 2 GB trajectory, and
less than 10% growth of peak RSS from the quarter to the whole file (4x the
frames).

The trajectory is a random walk made periodic (each block of 1,000 frames is
a Brownian bridge that ends where it started, so blocks can be repeated and
the path stays continuous for the unwrapping checks); its text is formatted
once per block and written block after block with the frame numbers updated.
Files go to a temporary folder (or ``--dir``) and are deleted afterwards.

Usage::

    python benchmarks/bench_ingest_memory.py                 # 2 GB
    python benchmarks/bench_ingest_memory.py --size-gb 0.2   # a quick run
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np

BLOCK = 1000  # frames formatted once and repeated

CHILD = r"""
import json, os, resource, sys, time, tracemalloc
t = time.perf_counter()
import numpy, h5py
import diffkit
from diffkit.io.assemble import ReadOptions
path, out, trace = sys.argv[1], sys.argv[2], sys.argv[3] == "trace"
if trace:
    tracemalloc.start()
if path != "-":
    diffkit.ingest(path, out, ReadOptions(frame_interval_ps=0.01, temperature_K=900.0))
    run = diffkit.open_run(out)
    n_frames = run.n_frames
else:
    n_frames = 0
traced = tracemalloc.get_traced_memory()[1] if trace else 0
status = open("/proc/self/status").read()
hwm = int(status.split("VmHWM:")[1].split()[0])  # kB
print(json.dumps({"n_frames": n_frames, "seconds": time.perf_counter() - t, "vmhwm_kB": hwm,
                  "maxrss_kB": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss,
                  "traced_peak_kB": traced // 1024}))
"""


def write_xdatcar(path, n_atoms, n_frames, seed=0, step=0.05):
    """A constant-cell XDATCAR of a periodic random walk; returns (bytes of header, of a frame)."""
    rng = np.random.default_rng(seed)
    n_li, n_p = int(0.6 * n_atoms), int(0.1 * n_atoms)
    counts = [n_li, n_p, n_atoms - n_li - n_p]
    cell = np.diag([14.0, 14.5, 15.0]) * (n_atoms / 200.0) ** (1 / 3)
    steps = rng.normal(scale=step, size=(BLOCK, n_atoms, 3))
    steps -= steps.mean(axis=0)  # the block's path ends where it started
    path_A = rng.random((n_atoms, 3)) @ cell + np.cumsum(steps, axis=0)
    frac = path_A @ np.linalg.inv(cell)
    frac -= np.floor(frac)
    frac[frac >= 1.0] = 0.0
    row = "%12.8f%12.8f%12.8f\n" * n_atoms
    bodies = [row % tuple(f.ravel().tolist()) for f in frac]
    header = ("periodic random walk\n" + f"{1.0:19.14f}\n"
              + "".join(" %15.10f %15.10f %15.10f\n" % tuple(v) for v in cell)
              + "".join(f"{s:>5s}" for s in ("Li", "P", "S")) + "\n"
              + "".join(f"{c:>6d}" for c in counts) + "\n")
    with open(path, "w", encoding="ascii", newline="\n") as f:
        f.write(header)
        for a in range(0, n_frames, BLOCK):
            f.write("".join(f"Direct configuration={a + i + 1:7d}\n{bodies[i]}"
                            for i in range(min(BLOCK, n_frames - a))))
    frame_bytes = len("Direct configuration=      1\n") + len(bodies[0])
    return len(header.encode()), frame_bytes


def run_child(path, out, trace=False):
    before = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    proc = subprocess.run([sys.executable, "-c", CHILD, path, out, "trace" if trace else "-"],
                          capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"child failed:\n{proc.stderr}")
    res = json.loads(proc.stdout.strip().splitlines()[-1])
    after = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    res["children_maxrss_kB"] = after if after > before else None  # the largest child so far
    return res


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--size-gb", type=float, default=2.0, help="size of the text trajectory")
    ap.add_argument("--atoms", type=int, default=200)
    ap.add_argument("--dir", default=None, help="folder for the files (default: a temporary one)")
    ap.add_argument("--no-traced", dest="traced", action="store_false",
                    help="skip the second ingest of each file under tracemalloc")
    args = ap.parse_args(argv)

    tmp = tempfile.mkdtemp(prefix="diffkit-bench-ingest-", dir=args.dir)
    try:
        big = os.path.join(tmp, "big.XDATCAR")
        quarter = os.path.join(tmp, "quarter.XDATCAR")
        # frame size first, from a tiny file of the same layout
        head, per_frame = write_xdatcar(big, args.atoms, 1)
        n_frames = max(8, int(args.size_gb * 1e9 // per_frame))
        n_frames -= n_frames % 4
        t = time.perf_counter()
        head, per_frame = write_xdatcar(big, args.atoms, n_frames)
        with open(big, "rb") as src, open(quarter, "wb") as dst:  # the first quarter of it
            todo = head + per_frame * (n_frames // 4)
            while todo:
                data = src.read(min(todo, 1 << 24))
                dst.write(data)
                todo -= len(data)
        print(f"wrote {os.path.getsize(big) / 1e9:.2f} GB ({n_frames} frames of {args.atoms} "
              f"atoms) and its first quarter in {time.perf_counter() - t:.0f} s", flush=True)

        rows = [("imports only", 0, 0.0, 0.0, run_child("-", "-"))]
        for label, path, frames in (("first quarter", quarter, n_frames // 4),
                                    ("whole file", big, n_frames)):
            out = os.path.join(tmp, "run.h5")
            res = run_child(path, out)
            assert res["n_frames"] == frames, (res["n_frames"], frames)
            h5gb = os.path.getsize(out) / 1e9
            os.unlink(out)
            if args.traced:  # once more, counting the bytes numpy and Python ask for
                res["traced_peak_kB"] = run_child(path, out, trace=True)["traced_peak_kB"]
                os.unlink(out)
            rows.append((label, frames, os.path.getsize(path) / 1e9, h5gb, res))
            print(f"  {label}: {res['seconds']:.0f} s, peak RSS {res['vmhwm_kB'] / 1024:.0f} MB",
                  flush=True)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)

    print()
    head = (f"{'run':<14} {'frames':>8} {'text GB':>8} {'run file GB':>12} {'time s':>7} "
            f"{'peak RSS MB':>12} {'(getrusage)':>12} {'traced peak MB':>15}")
    print(head)
    print("-" * len(head))
    for label, frames, gb, h5gb, res in rows:
        traced = f"{res['traced_peak_kB'] / 1024:15.0f}" if res.get("traced_peak_kB") else \
            f"{'-':>15}"
        print(f"{label:<14} {frames:8d} {gb:8.2f} {h5gb:12.2f} {res['seconds']:7.1f} "
              f"{res['vmhwm_kB'] / 1024:12.0f} {res['maxrss_kB'] / 1024:12.0f} {traced}")
    q, w = rows[1][4]["vmhwm_kB"], rows[2][4]["vmhwm_kB"]
    print(f"\npeak RSS whole file: {w / 1024:.0f} MB (goal < 500 MB); growth from the first "
          f"quarter to the whole file (4x the frames): {100 * (w - q) / q:+.1f}% (goal < 10%)")
    if args.traced:
        q, w = rows[1][4]["traced_peak_kB"], rows[2][4]["traced_peak_kB"]
        print(f"peak of the memory numpy and Python asked for (tracemalloc): {q / 1024:.0f} MB "
              f"-> {w / 1024:.0f} MB ({100 * (w - q) / q:+.1f}%)")
    children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
    print(f"largest child peak by getrusage(RUSAGE_CHILDREN): {children / 1024:.0f} MB")


if __name__ == "__main__":
    main()
