"""Benchmark: time-origin-averaged MSD by FFT against the direct double loop.

For each case (atoms x frames of random-walk positions, float64, in memory)
this prints, measured in the same run:

* the FFT path's time (``diffkit.compute_msd``), once for total + per-axis MSD
  only (``per_ion=False, tensor=False``) and once with every output (per-ion
  curves, alpha2, full tensor, collective MSD);
* the direct double loop's time, measured on a subset of atoms and frames and
  **extrapolated** to the full case as O(n_frames^2) per atom (stated in the
  output);
* their ratio;
* the FFT path's time as a multiple of one numpy pass over the same array
  (``positions.sum()``).

Usage::

    python benchmarks/bench_msd.py            # 200 x 20,000 and 500 x 100,000
    python benchmarks/bench_msd.py --quick    # 200 x 20,000 only

The 500 x 100,000 case holds 1.2 GB of positions; it needs ~2 GB of free memory.
Goals (issue "Step 4"): >= 300x the direct loop at 20,000 frames; total +
per-axis <= 50x one pass at 500 x 100,000, every output <= 100x.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from diffkit.msd import compute_msd
from diffkit.trajectory import Trajectory


def _limit_threads():
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # pragma: no cover - optional
        return None
    return threadpool_limits(limits=1)


def random_walk_trajectory(n_atoms, n_frames, *, dt_ps=0.1, seed=0):
    """Random-walk positions (n_frames, n_atoms, 3) float64 as a Trajectory, built in chunks."""
    rng = np.random.default_rng(seed)
    pos = np.empty((n_frames, n_atoms, 3))
    start = rng.uniform(0, 20, size=(n_atoms, 3))
    chunk = max(1, 2_000_000 // (n_atoms * 3))
    for a in range(0, n_frames, chunk):
        b = min(n_frames, a + chunk)
        steps = rng.normal(0.0, 0.3, size=(b - a, n_atoms, 3))
        np.cumsum(steps, axis=0, out=steps)
        pos[a:b] = steps + start
        start = pos[b - 1]
    return Trajectory(["Li"] * n_atoms, np.arange(n_frames) * dt_ps, np.eye(3) * 1e4, pos,
                      temperature_K=600.0, frame_interval_ps=dt_ps)


def direct_loop(x, max_lag):
    """The O(N^2) time-origin average for positions x (n_frames, k, 3): MSD per lag."""
    out = np.zeros(max_lag + 1)
    for m in range(1, max_lag + 1):
        d = x[m:] - x[:-m]
        out[m] = np.einsum("tka,tka->", d, d) / (d.shape[0] * d.shape[1])
    return out


_CPU = {}  # best process (CPU) time of the last best_of call per label


def best_of(fn, repeat, label=None):
    """Best wall time of ``repeat`` calls, s; the best CPU time goes to ``_CPU[label]``."""
    best = cpu = np.inf
    for _ in range(repeat):
        c0, t0 = time.process_time(), time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
        cpu = min(cpu, time.process_time() - c0)
    if label:
        _CPU[label] = cpu
    return best


def run_case(n_atoms, n_frames, *, sub_atoms=2, sub_frames=4000, repeat=2):
    print(f"\n== {n_atoms} atoms x {n_frames:,} frames "
          f"({n_atoms * n_frames * 3 * 8 / 2**20:,.0f} MB of float64 positions) ==")
    traj = random_walk_trajectory(n_atoms, n_frames)
    pos = traj.positions
    t_pass = best_of(lambda: pos.sum(), 5, "pass")
    print(f"one numpy pass (positions.sum()):        {t_pass * 1e3:9.1f} ms")

    t_min = best_of(lambda: compute_msd(traj, "Li", reference="none", per_ion=False,
                                        tensor=False), repeat, "min")
    print(f"FFT, total + per-axis only:              {t_min:9.2f} s  = {t_min / t_pass:6.1f} x one pass"
          f"  ({t_min / (n_atoms * n_frames) * 1e9:.0f} ns per atom-frame)")
    t_all = best_of(lambda: compute_msd(traj, "Li", reference="none"), repeat, "all")
    print(f"FFT, every output:                       {t_all:9.2f} s  = {t_all / t_pass:6.1f} x one pass"
          f"  ({t_all / (n_atoms * n_frames) * 1e9:.0f} ns per atom-frame)")
    # on a shared machine wall times wander; CPU times of this process are steadier
    print(f"same ratios in CPU time of this process: {_CPU['min'] / _CPU['pass']:6.1f} x "
          f"(total + per-axis), {_CPU['all'] / _CPU['pass']:6.1f} x (every output)")

    # direct loop on a subset, extrapolated as O(n_frames^2) per atom
    sf = min(sub_frames, n_frames)
    sub = np.ascontiguousarray(pos[:sf, :sub_atoms])
    t_sub = best_of(lambda: direct_loop(sub, sf // 2), 3)
    t_direct = t_sub * (n_frames / sf) ** 2 * (n_atoms / sub_atoms)
    print(f"direct loop, measured on {sub_atoms} atoms x {sf:,} frames: {t_sub:.2f} s "
          f"({t_sub / (sub_atoms * sf) * 1e6:.1f} us per atom-frame)")
    print(f"direct loop, EXTRAPOLATED as O(N^2) x atoms to the full case: {t_direct:,.0f} s "
          f"({t_direct / (n_atoms * n_frames) * 1e6:.0f} us per atom-frame)")
    print(f"speed-up of the FFT path over the direct loop: {t_direct / t_min:,.0f}x "
          f"(total + per-axis), {t_direct / t_all:,.0f}x (every output)")
    # the two paths agree (spot check on the subset)
    small = Trajectory(["Li"] * sub_atoms, np.arange(sf) * 0.1, np.eye(3) * 1e4, sub)
    got = compute_msd(small, "Li", reference="none", per_ion=False, tensor=False).msd_A2
    ref = direct_loop(sub, len(got) - 1)
    rel = np.max(np.abs(got[1:] - ref[1:]) / ref[1:])
    print(f"check: FFT vs direct on the subset, max relative difference {rel:.1e}")
    del traj, pos
    return {"pass_s": t_pass, "fft_min_s": t_min, "fft_all_s": t_all, "direct_s": t_direct}


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="only the 200 x 20,000 case")
    args = parser.parse_args(argv)
    limiter = _limit_threads()
    print("BLAS threads limited to 1 (threadpoolctl)" if limiter is not None
          else "threadpoolctl not installed: BLAS threads not limited")
    run_case(200, 20_000)
    if not args.quick:
        run_case(500, 100_000)


if __name__ == "__main__":
    main()
