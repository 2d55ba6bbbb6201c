"""Calibrate the relative error of D against the effective number of hops.

He, Zhu, Epstein & Mo (npj Comput. Mater. 4, 18 (2018)) found that the relative
standard deviation of D from ab initio MD falls with the effective number of
hops N_eff (total squared displacement of the mobile ions at the end of the run
divided by the squared jump distance) roughly as

    RSD(D) ≈ A / sqrt(N_eff) + B,     A ≈ 3.43, B ≈ 0.04 (formula and constants from memory).

diffkit uses this scaling to predict the precision of a run and how much longer
it must run (diffkit.trust). Because the published form is recalled from memory
and was fitted to a different estimator, its constants are re-fitted here on
runs with a known answer: non-interacting hoppers on a simple cubic lattice
(diffkit.synth.hopping_run, exact D = Γ_total a²/6), analysed exactly as a user's
run would be (count_hops for N_eff, compute_msd + estimate_diffusion for D).

For each configuration (ions × frames × hop rate) several seeds give the RSD of
D around the truth and the mean N_eff; A and B are fitted by weighted least
squares (weights from the sampling error of an RSD over n seeds, RSD/sqrt(2n)).

Run:  python benchmarks/calibrate_hop_scaling.py [--seeds 24] [--quick]
Prints a table and the fitted constants; copy them into diffkit/trust.py
(_RSD_A, _RSD_B) with the date and the command line.
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
from scipy import optimize

from diffkit.diffusion import estimate_diffusion
from diffkit.hops import count_hops
from diffkit.msd import compute_msd
from diffkit.synth import hopping_run
from diffkit.units import K_B_EV_PER_K

T_K = 600.0
NU_THZ = 10.0
DT_PS = 0.1


def Ea_for_residence(frames):
    """Ea giving a mean residence of ``frames`` frames (z = 6, Γ_total = 6 ν exp(−Ea/kT))."""
    return K_B_EV_PER_K * T_K * math.log(6 * NU_THZ * frames * DT_PS)


# (n_ions, n_frames, mean residence in frames): N_eff from ~12 to ~80,000
CONFIGS = [
    (10, 1000, 800), (10, 1000, 400), (10, 1000, 150), (20, 1000, 100), (20, 2000, 80),
    (30, 2000, 50),
    (50, 2000, 40), (50, 4000, 40), (100, 2000, 20), (100, 4000, 20), (100, 4000, 10),
    (100, 8000, 10),
]
QUICK = [(10, 1000, 150), (30, 2000, 50), (100, 4000, 20)]


def one_run(n_ions, n_frames, residence, seed):
    run = hopping_run(n_ions=n_ions, n_frames=n_frames, frame_interval_ps=DT_PS,
                      temperature_K=T_K, Ea_eV=Ea_for_residence(residence),
                      attempt_frequency_THz=NU_THZ, jump_distance_A=2.0,
                      vibration_rms_A=0.15, seed=seed)
    hops = count_hops(run.trajectory, "Li")
    est = estimate_diffusion(compute_msd(run.trajectory, "Li", reference="none"))
    rel = est.D_cm2_per_s / run.truth.D_cm2_per_s - 1.0
    usable = bool(np.isfinite(rel) and not est.is_upper_bound)
    return hops.n_effective_hops, rel, usable


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=24, help="seeds per configuration")
    ap.add_argument("--quick", action="store_true", help="three configurations only")
    args = ap.parse_args(argv)
    configs = QUICK if args.quick else CONFIGS
    rows = []
    t0 = time.time()
    print(f"{'ions':>5} {'frames':>6} {'resid':>5} {'N_eff':>9} {'RSD':>7} {'usable':>7}")
    for n_ions, n_frames, residence in configs:
        res = [one_run(n_ions, n_frames, residence, 1000 * residence + s)
               for s in range(args.seeds)]
        n_eff = np.array([r[0] for r in res])
        rel = np.array([r[1] for r in res])
        ok = np.array([r[2] for r in res])
        if ok.sum() < 5:
            print(f"{n_ions:5d} {n_frames:6d} {residence:5d}   too few usable runs ({ok.sum()})")
            continue
        rsd = float(np.sqrt(np.mean(rel[ok] ** 2)))
        rows.append((float(np.mean(n_eff)), rsd, int(ok.sum())))
        print(f"{n_ions:5d} {n_frames:6d} {residence:5d} {np.mean(n_eff):9.1f} {rsd:7.4f} "
              f"{ok.sum():4d}/{len(ok)}")
    N = np.array([r[0] for r in rows])
    rsd = np.array([r[1] for r in rows])
    m = np.array([r[2] for r in rows])
    sigma = rsd / np.sqrt(2.0 * m)
    model = lambda n, A, B: A / np.sqrt(n) + B  # noqa: E731
    (A, B), cov = optimize.curve_fit(model, N, rsd, p0=(1.0, 0.01), sigma=sigma,
                                     absolute_sigma=True, bounds=([0, 0], [np.inf, 1]))
    chi2 = float(np.sum(((rsd - model(N, A, B)) / sigma) ** 2))
    print(f"\nfitted: RSD = {A:.3f}/sqrt(N_eff) + {B:.4f}   "
          f"(± {math.sqrt(cov[0, 0]):.3f}, ± {math.sqrt(cov[1, 1]):.4f}; "
          f"chi2 = {chi2:.1f} on {len(N) - 2} dof)")
    print("He et al. 2018 (from memory): RSD = 3.43/sqrt(N_eff) + 0.04")
    print(f"{len(rows)} configurations × {args.seeds} seeds in {time.time() - t0:.0f} s")
    return A, B


if __name__ == "__main__":
    main()
