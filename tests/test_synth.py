"""Known-answer trajectory generators (diffkit.synth) checked against outside results.

Outside references used here:
- Einstein relation for an uncorrelated lattice walk, D = Γ_total a² / (2d)
  (Mehrer, Diffusion in Solids, Springer 2007, ch. 4; the project's shared REFERENCES.md).
- Tracer correlation factors of the single-vacancy mechanism (Compaan & Haven,
  Trans. Faraday Soc. 52, 786 (1956); tabulated in Mehrer ch. 7; REFERENCES.md).
- Boltzmann constant and unit factors from scipy.constants (CODATA).
- Exponential residence times / Poisson counts of a constant-rate jump process
  (common practice).
- Atomic masses from ase.data.
"""

from __future__ import annotations

import math
import os
import warnings

import numpy as np
import pytest
from scipy import constants as sc

from diffkit.errors import DiffkitWarning, UsageError
from diffkit.synth import (CampaignTruth, GroundTruth, SyntheticRun, ar2_autocorrelation,
                           arrhenius_campaign,
                           hopping_run, network_diffusion_tensor, vacancy_kmc_run, write_run)

K_B_EV = sc.k / sc.e  # CODATA via scipy, independent of diffkit.units
A2PS_TO_CM2S = (sc.angstrom / sc.centi) ** 2 / sc.pico


def gamma(nu_THz, Ea_eV, T_K):
    """Arrhenius jump rate per direction, 1/ps (ν in THz = 1/ps)."""
    return nu_THz * math.exp(-Ea_eV / (K_B_EV * T_K))


def per_ion_msd(pos, lag):
    """(n_ions,) time-origin-averaged squared displacement at one lag (direct, no FFT)."""
    d = pos[lag:] - pos[:-lag]
    return np.mean(np.sum(d * d, axis=-1), axis=0)


def per_ion_D(pos, lag1, lag2, dt, dim):
    """Per-ion D from the MSD slope between two lags (the vibration offset cancels)."""
    return (per_ion_msd(pos, lag2) - per_ion_msd(pos, lag1)) / ((lag2 - lag1) * dt * 2 * dim)


def min_image(d, cell):
    """Minimum-image vectors for an orthogonal or mildly skewed cell (short vectors)."""
    f = d @ np.linalg.inv(cell)
    f -= np.round(f)
    return f @ cell


# ----------------------------------------------------------------------------- hopping: D
@pytest.mark.parametrize("lattice, z, dim", [("sc", 6, 3), ("square", 4, 2)])
def test_hopping_msd_reproduces_einstein_relation(lattice, z, dim):
    # D = Γ_total a² / (2d), Γ_total = z Γ (Einstein relation, Mehrer ch. 4).
    nu, Ea, T, a, dt = 10.0, 0.2, 600.0, 2.0, 0.1
    D_exact = z * gamma(nu, Ea, T) * a * a / (2 * dim)
    ests, zs = [], []
    for seed in range(5):
        run = hopping_run(n_ions=100, n_frames=2000, frame_interval_ps=dt, temperature_K=T,
                          Ea_eV=Ea, attempt_frequency_THz=nu, jump_distance_A=a,
                          lattice=lattice, vibration_rms_A=0.2, seed=seed)
        assert run.truth.D_A2_per_ps == pytest.approx(D_exact, rel=1e-12)
        assert run.truth.D_cm2_per_s == pytest.approx(D_exact * A2PS_TO_CM2S, rel=1e-12)
        assert run.truth.dimension == dim and run.truth.coordination == z
        pos = run.trajectory.positions[:, :, :dim]  # in-plane for the 2D lattice
        Di = per_ion_D(pos, 10, 100, dt, dim)
        # ions are independent: their spread gives an honest standard error
        ests.append(Di)
        zs.append((Di.mean() - D_exact) / (Di.std(ddof=1) / math.sqrt(len(Di))))
    pooled = np.concatenate(ests)
    z_pooled = (pooled.mean() - D_exact) / (pooled.std(ddof=1) / math.sqrt(len(pooled)))
    assert abs(z_pooled) < 3, (z_pooled, zs)
    assert max(abs(x) for x in zs) < 4, zs


def test_sites_network_D_exact_for_alternating_chain():
    # Sites at 0 and b in a repeat of length L, jumps to both neighbours with rate Γ:
    # the site index is a symmetric random walk with 2Γ jumps per unit time and the
    # position is (L/2)·index plus a bounded term, so D = (L/2)² (2Γ) / 2 = Γ L² / 4
    # (derived; common practice), not the naive Γ (b² + c²) / 2.
    L, b, rate = 4.0, 1.2, 0.7
    cell = np.diag([L, 10.0, 10.0])
    frac = np.array([[0.0, 0.5, 0.5], [b / L, 0.5, 0.5]])
    Dt = network_diffusion_tensor(cell, frac, 2.9, rate)
    assert Dt[0, 0] == pytest.approx(rate * L * L / 4, rel=1e-10)
    assert abs(Dt[0, 0] - rate * (b * b + (L - b) ** 2) / 2) > 0.1 * Dt[0, 0]
    assert np.allclose(Dt[1:, :], 0) and np.allclose(Dt[:, 1:], 0)


def test_sites_chain_run_msd_matches_exact_D():
    # Same chain run through hopping_run; MSD slope vs Γ L² / 4 (derived above).
    L, b, nu, Ea, T, dt = 4.0, 1.2, 10.0, 0.2, 600.0, 0.1
    D_exact = gamma(nu, Ea, T) * L * L / 4
    Di = []
    for seed in range(3):
        run = hopping_run(lattice="sites", sites=[[0, 0.5, 0.5], [b / L, 0.5, 0.5]],
                          cell=[L, 10, 10], neighbour_cutoff_A=2.9, n_ions=100, n_frames=2000,
                          frame_interval_ps=dt, temperature_K=T, Ea_eV=Ea,
                          attempt_frequency_THz=nu, vibration_rms_A=0.1, seed=seed)
        assert run.truth.dimension == 1
        assert run.truth.D_A2_per_ps == pytest.approx(D_exact, rel=1e-9)
        Di.append(per_ion_D(run.trajectory.positions[:, :, :1], 10, 100, dt, 1))
    Di = np.concatenate(Di)
    z = (Di.mean() - D_exact) / (Di.std(ddof=1) / math.sqrt(len(Di)))
    assert abs(z) < 3, z


def test_sites_bcc_unit_gives_einstein_D():
    # bcc given as two sites of the cubic cell: z = 8 jumps of a = √3/2·a_c, no local
    # drift, so D = 8 Γ a² / 6 (Einstein relation, Mehrer ch. 4).
    ac, nu, Ea, T, dt = 3.0, 10.0, 0.25, 700.0, 0.1
    a = math.sqrt(3) / 2 * ac
    D_exact = 8 * gamma(nu, Ea, T) * a * a / 6
    run = hopping_run(lattice="sites", sites=[[0, 0, 0], [0.5, 0.5, 0.5]], cell=ac,
                      n_ions=200, n_frames=2000, frame_interval_ps=dt, temperature_K=T,
                      Ea_eV=Ea, attempt_frequency_THz=nu, seed=3)
    t = run.truth
    assert (t.coordination, t.dimension) == (8, 3)
    assert t.jump_distance_A == pytest.approx(a, rel=1e-12)
    assert t.D_A2_per_ps == pytest.approx(D_exact, rel=1e-10)
    Di = per_ion_D(run.trajectory.positions, 10, 100, dt, 3)
    z = (Di.mean() - D_exact) / (Di.std(ddof=1) / math.sqrt(len(Di)))
    assert abs(z) < 3, z


# ----------------------------------------------------------------------------- hopping: statistics
def test_residence_times_are_exponential_with_short_stays():
    # Constant-rate jumps: residence times exponential with mean 1/(zΓ), hop counts per
    # ion Poisson with mean zΓT (common practice).
    nu, Ea, T, dt, n_frames = 10.0, 0.2, 600.0, 0.1, 4000
    run = hopping_run(n_ions=100, n_frames=n_frames, frame_interval_ps=dt, temperature_K=T,
                      Ea_eV=Ea, attempt_frequency_THz=nu, seed=11)
    t = run.truth
    rate_total = 6 * gamma(nu, Ea, T)
    assert t.total_rate_per_ps == pytest.approx(rate_total, rel=1e-12)
    span = (n_frames - 1) * dt
    counts = np.bincount(t.hop_ions, minlength=100)
    expected = rate_total * span
    assert abs(counts.mean() - expected) < 4 * math.sqrt(expected / 100)
    assert counts.var(ddof=1) == pytest.approx(expected, rel=0.3)  # Poisson: var = mean
    stays = np.concatenate([np.diff(t.hop_times_ps[t.hop_ions == i]) for i in range(100)])
    assert stays.mean() == pytest.approx(1 / rate_total, rel=4 / math.sqrt(len(stays)))
    short = np.mean(stays < 3 * dt)  # stays of fewer than three frames
    p = 1 - math.exp(-rate_total * 3 * dt)
    assert short > 0.1
    assert abs(short - p) < 4 * math.sqrt(p * (1 - p) / len(stays))


def test_several_hops_between_frames_at_high_rate():
    run = hopping_run(n_ions=50, n_frames=200, frame_interval_ps=0.5, temperature_K=1500,
                      Ea_eV=0.1, seed=2)
    t = run.truth
    key = t.hop_frames * 1000 + t.hop_ions
    _, n = np.unique(key, return_counts=True)
    assert n.max() >= 2


def test_vibration_rms_per_axis_and_framework():
    # No hops (huge Ea): every atom vibrates about a fixed point with the given rms per axis.
    sigma = 0.15
    run = hopping_run(n_ions=40, n_frames=2000, Ea_eV=50.0, vibration_rms_A=sigma,
                      framework={"P": 8, "S": 32}, seed=5)
    assert run.truth.n_hops == 0
    traj = run.trajectory
    pos = traj.positions
    dev = pos - pos.mean(axis=0)
    n = pos.shape[0]
    rms = np.sqrt(np.mean(dev ** 2, axis=(0, 1)) * n / (n - 1))
    assert np.allclose(rms, sigma, rtol=0.02)
    fw = traj.indices("S")
    assert np.sqrt(np.mean(dev[:, fw] ** 2)) == pytest.approx(sigma, rel=0.03)
    # mobile ions vibrate about their sites
    sites = run.truth.site_positions_A[run.truth.initial_site_of_atom]
    assert np.allclose(pos[:, :40].mean(axis=0), sites, atol=5 * sigma / math.sqrt(n))
    # masses from ASE
    from ase.data import atomic_masses, atomic_numbers
    for s in ("Li", "P", "S"):
        assert np.all(traj.masses[traj.indices(s)] == atomic_masses[atomic_numbers[s]])
    assert list(traj.symbols) == ["Li", "P", "S"]
    assert traj.count("P") == 8 and traj.count("S") == 32


def test_uncorrelated_vibration_unchanged_by_the_correlated_option():
    # vibration_period_frames=None must keep the old noise bit for bit: the same
    # numbers as leaving the option out, and that noise is σ × one block of standard
    # normals drawn last (so the hops, sites and framework draws are untouched)
    kw = dict(n_ions=12, n_frames=400, Ea_eV=0.3, framework={"S": 6}, cells_per_side=12, seed=8)
    plain = hopping_run(vibration_rms_A=0.2, **kw).trajectory.positions
    same = hopping_run(vibration_rms_A=0.2, vibration_period_frames=None,
                       vibration_damping=None, **kw).trajectory.positions
    assert np.array_equal(plain, same)
    still = hopping_run(vibration_rms_A=0.0, **kw).trajectory.positions
    half = hopping_run(vibration_rms_A=0.4, **kw).trajectory.positions
    assert np.allclose(plain - still, 0.5 * (half - still), rtol=0, atol=1e-9)
    noise = (half - still).reshape(400, -1)
    lag1 = np.mean(noise[1:] * noise[:-1]) / np.mean(noise * noise)
    assert abs(lag1) < 0.03                        # independent frame to frame
    corr = hopping_run(vibration_rms_A=0.2, vibration_period_frames=10, **kw)
    assert not np.allclose(corr.trajectory.positions, plain)
    params = corr.trajectory.provenance["parameters"]
    assert params["vibration_period_frames"] == 10
    assert params["vibration_damping"] == pytest.approx(math.exp(-0.1))
    assert "vibration_period_frames" not in hopping_run(n_ions=2, n_frames=3).trajectory \
        .provenance["parameters"]


def test_ar2_autocorrelation_matches_closed_form():
    # Box & Jenkins, Time Series Analysis, ch. 3 (AR(2) with complex roots, from memory):
    # ρ_k = r^k sin(kω + F) / sin F with tan F = (1 + r²)/(1 − r²) · tan ω, for
    # φ1 = 2 r cos ω > 0, φ2 = −r²
    for period, r in ((5, 0.8), (10, 0.9), (50, 0.98)):
        w = 2 * math.pi / period
        F = math.atan((1 + r * r) / (1 - r * r) * math.tan(w))
        k = np.arange(3 * period)
        closed = r ** k * np.sin(k * w + F) / math.sin(F)
        rho = ar2_autocorrelation(2 * r * math.cos(w), -r * r, 3 * period - 1)
        assert np.allclose(rho, closed, atol=1e-12)


@pytest.mark.parametrize("period, damping", [(5, None), (10, 0.9), (50, 0.99)])
def test_correlated_vibration_is_the_stationary_ar2_process(period, damping):
    # reference: the stationary AR(2) process (Box & Jenkins, Time Series Analysis,
    # ch. 3): stationary variance σ² per axis from the first frame on, and the
    # autocorrelation of ar2_autocorrelation (checked against the closed form above)
    sigma = 0.25
    run = hopping_run(n_ions=200, n_frames=4000, Ea_eV=50.0, vibration_rms_A=sigma,
                      vibration_period_frames=period, vibration_damping=damping, seed=21)
    assert run.truth.n_hops == 0
    pos = run.trajectory.positions
    x = (pos - run.truth.site_positions_A[run.truth.initial_site_of_atom][None]).reshape(
        4000, -1)                                          # 600 independent series
    r = math.exp(-1.0 / period) if damping is None else damping
    rho = ar2_autocorrelation(2 * r * math.cos(2 * math.pi / period), -r * r, 2 * period)
    # stationary from frame 0: the ensemble variance at the first, second and last frames
    for f in (0, 1, 2, -1):
        assert np.mean(x[f] ** 2) == pytest.approx(sigma ** 2, rel=0.15)
    # the lag-one ensemble correlation at frames 0-1 is already the stationary one
    assert np.mean(x[0] * x[1]) / sigma ** 2 == pytest.approx(rho[1], abs=0.08)
    # time averages over all series
    assert np.mean(x * x) == pytest.approx(sigma ** 2, rel=0.02)
    emp = np.array([np.mean(x[k:] * x[:len(x) - k]) for k in range(2 * period + 1)]) / sigma ** 2
    assert np.allclose(emp, rho, atol=0.03), np.abs(emp - rho).max()
    # and the run is still written and read like any other (no change to the hop list)
    assert run.truth.vibration_rms_A == sigma


def test_trajectory_metadata():
    run = hopping_run(n_ions=10, n_frames=50, frame_interval_ps=0.02, temperature_K=900, seed=4)
    traj = run.trajectory
    assert isinstance(run, SyntheticRun) and isinstance(run.truth, GroundTruth)
    assert traj.times_ps[0] == 0 and traj.frame_interval_ps == pytest.approx(0.02)
    assert traj.temperature_K == 900
    assert np.allclose(traj.cells, traj.cells[0]) and np.allclose(traj.cells[0],
                                                                  np.diag(np.diag(traj.cells[0])))
    assert traj.provenance["generator"] == "diffkit.synth.hopping_run"
    assert traj.provenance["seed"] == 4
    assert traj.provenance["parameters"]["temperature_K"] == 900
    d = run.truth.to_dict()
    assert d["n_hops"] == run.truth.n_hops and isinstance(d["hop_times_ps"], list)
    assert "hop_times_ps" not in run.truth.to_dict(include_hops=False)
    assert "GroundTruth(" in repr(run.truth)


# ----------------------------------------------------------------------------- hop list consistency
@pytest.mark.parametrize("kwargs", [
    dict(lattice="sc"),
    dict(lattice="square"),
    dict(lattice="sites", sites=[[0, 0.5, 0.5], [0.3, 0.5, 0.5]], cell=[4, 10, 10],
         neighbour_cutoff_A=2.9),
    dict(lattice="sites", sites=[[0, 0, 0], [0.5, 0.5, 0.5]], cell=3.0),
])
def test_hop_list_reproduces_site_displacements(kwargs):
    run = hopping_run(n_ions=30, n_frames=500, frame_interval_ps=0.1, temperature_K=800,
                      vibration_rms_A=0.0, seed=9, **kwargs)
    t, traj = run.truth, run.trajectory
    pos, cell, sites = traj.positions, traj.cells[0], t.site_positions_A
    assert np.all(np.diff(t.hop_times_ps) >= 0)
    assert np.all((t.hop_frames >= 1) & (t.hop_frames < traj.n_frames))
    # first saved frame at or after each hop
    fi = traj.frame_interval_ps
    assert np.all(t.hop_frames * fi >= t.hop_times_ps - 1e-9)
    assert np.all((t.hop_frames - 1) * fi < t.hop_times_ps)
    assert np.allclose(pos[0], sites[t.initial_site_of_atom], atol=1e-9)
    for ion in range(30):
        sel = t.hop_ions == ion
        frm, to = t.hop_from_site[sel], t.hop_to_site[sel]
        # the hops form a chain starting at the ion's first site
        chain = np.concatenate([[t.initial_site_of_atom[ion]], to[:-1]])
        assert np.array_equal(frm, chain)
        jumps = min_image(sites[to] - sites[frm], cell)
        assert np.allclose(jumps.sum(axis=0), pos[-1, ion] - pos[0, ion], atol=1e-8)
        # the position changes exactly at frames with a hop (or at none, if jumps cancel)
        moved = np.flatnonzero(np.any(np.abs(np.diff(pos[:, ion], axis=0)) > 1e-9, axis=1)) + 1
        assert set(moved) <= set(t.hop_frames[sel])
        # and between hop frames, the position is the sum of the jumps so far
        for f in np.unique(t.hop_frames[sel])[:20]:
            upto = t.hop_frames[sel] <= f
            assert np.allclose(pos[f, ion] - pos[0, ion], jumps[upto].sum(axis=0), atol=1e-8)


# ----------------------------------------------------------------------------- determinism
def test_same_seed_same_run_different_seed_differs():
    a = hopping_run(n_ions=20, n_frames=300, framework={"S": 4}, seed=7)
    b = hopping_run(n_ions=20, n_frames=300, framework={"S": 4}, seed=7)
    c = hopping_run(n_ions=20, n_frames=300, framework={"S": 4}, seed=8)
    assert np.array_equal(a.trajectory.positions, b.trajectory.positions)
    for f in ("hop_times_ps", "hop_ions", "hop_from_site", "hop_to_site"):
        assert np.array_equal(getattr(a.truth, f), getattr(b.truth, f))
    assert not np.array_equal(a.trajectory.positions, c.trajectory.positions)
    k1 = vacancy_kmc_run(lattice="fcc", cells_per_side=3, n_replicas=3, n_vacancy_jumps=600,
                         save_every=20, seed=1)
    k2 = vacancy_kmc_run(lattice="fcc", cells_per_side=3, n_replicas=3, n_vacancy_jumps=600,
                         save_every=20, seed=1)
    k3 = vacancy_kmc_run(lattice="fcc", cells_per_side=3, n_replicas=3, n_vacancy_jumps=600,
                         save_every=20, seed=2)
    assert np.array_equal(k1.trajectory.positions, k2.trajectory.positions)
    assert np.array_equal(k1.truth.hop_ions, k2.truth.hop_ions)
    assert not np.array_equal(k1.trajectory.positions, k3.trajectory.positions)


# ----------------------------------------------------------------------------- vacancy KMC
def kmc_correlation_factor(run, lag1=2, lag2=10):
    """f from a direct time-origin-averaged MSD slope (no centre-of-mass removal).

    Returns f and its standard error from the spread over the independent replicas.
    """
    t = run.truth
    pos = run.trajectory.positions
    dt = run.trajectory.frame_interval_ps
    per_atom = per_ion_D(pos, lag1, lag2, dt, t.dimension) / t.D_A2_per_ps
    per_rep = np.bincount(t.replica_of_atom, weights=per_atom) / np.bincount(t.replica_of_atom)
    return per_atom.mean(), per_rep.std(ddof=1) / math.sqrt(len(per_rep))


# Compaan & Haven, Trans. Faraday Soc. 52, 786 (1956); Mehrer ch. 7; REFERENCES.md
COMPAAN_HAVEN = {"sc": 0.65311, "bcc": 0.72719, "fcc": 0.78145, "triangular": 0.56006,
                 "square": 0.46694}


@pytest.mark.parametrize("lattice", ["sc", "bcc", "fcc", "triangular", "square"])
def test_vacancy_kmc_tracer_correlation_factor(lattice):
    # ~1,000 sites per replica, 20 replicas, 200 frames of N/4 vacancy jumps each.
    run = vacancy_kmc_run(lattice=lattice, n_replicas=20, record_hops=False, seed=0)
    t = run.truth
    assert 800 <= t.sites_per_replica <= 1100
    # uncorrelated tracer D = z w a² / ((N − 1) 2d): each vacancy jump moves one of N − 1 atoms
    z = {"sc": 6, "bcc": 8, "fcc": 12, "triangular": 6, "square": 4}[lattice]
    dim = 2 if lattice in ("triangular", "square") else 3
    N = t.sites_per_replica
    assert t.D_A2_per_ps == pytest.approx(z * 1.0 * 2.5 ** 2 / ((N - 1) * 2 * dim), rel=1e-12)
    f, f_err = kmc_correlation_factor(run)
    ref = COMPAAN_HAVEN[lattice]
    assert abs(f / ref - 1) < 0.01, (f, f_err)
    assert f_err < 0.004 * ref  # the replicas give the stated precision


def test_vacancy_kmc_replays_sequentially():
    # A direct sequential simulation of the recorded hops: each hop must move the atom that
    # sits on the from-site into the vacancy, and replaying the jumps gives the positions.
    for lattice, m in (("sc", 4), ("triangular", 5), ("bcc", 2)):
        run = vacancy_kmc_run(lattice=lattice, cells_per_side=m, n_replicas=3,
                              n_vacancy_jumps=300, save_every=3, seed=4)
        t, traj = run.truth, run.trajectory
        N, R = t.sites_per_replica, t.n_replicas
        cell, sites = traj.cells[0], t.site_positions_A
        occ = np.full((R, N), -1)
        for atom in range(traj.n_atoms):
            occ[t.replica_of_atom[atom], t.initial_site_of_atom[atom]] = atom
        assert np.all((occ == -1).sum(axis=1) == 1)
        pos = traj.positions[0].copy()
        assert np.allclose(pos, sites[t.initial_site_of_atom])
        n_hops = 0
        for f in range(1, traj.n_frames):
            for k in np.flatnonzero(t.hop_frames == f):
                r, atom = t.replica_of_atom[t.hop_ions[k]], t.hop_ions[k]
                frm, to = t.hop_from_site[k], t.hop_to_site[k]
                assert occ[r, frm] == atom and occ[r, to] == -1
                d = min_image(sites[to] - sites[frm], cell)
                assert np.linalg.norm(d) == pytest.approx(t.jump_distance_A, rel=1e-9)
                pos[atom] += d
                occ[r, to], occ[r, frm] = atom, -1
                n_hops += 1
            assert np.allclose(traj.positions[f], pos, atol=1e-9)
        assert n_hops == R * 300 == t.n_hops
        # the atoms' displacements sum to minus the vacancy's: the vacancy walked from its
        # first to its last site, so the sum is a lattice vector ending at the hole
        total = (traj.positions[-1] - traj.positions[0]).reshape(R, N - 1, 3).sum(axis=1)
        for r in range(R):
            v0 = np.setdiff1d(np.arange(N), t.initial_site_of_atom[t.replica_of_atom == r])[0]
            v1 = int(np.flatnonzero(occ[r] == -1)[0])
            assert np.allclose(min_image(-total[r] - (sites[v1] - sites[v0]), cell), 0,
                               atol=1e-8)


# ----------------------------------------------------------------------------- campaign
def test_arrhenius_campaign_truth():
    temps = (500, 750, 1000)
    ct = arrhenius_campaign(temperatures_K=temps, Ea_eV=0.25, attempt_frequency_THz=8.0,
                            n_ions=20, n_frames=200, jump_distance_A=2.2, seed=3)
    assert isinstance(ct, CampaignTruth) and len(ct.runs) == 3
    # D = z ν a² / (2d) exp(−Ea / k_B T), z = 6, d = 3 (Einstein relation; CODATA k_B)
    D0 = 6 * 8.0 * 2.2 ** 2 / 6 * A2PS_TO_CM2S
    assert ct.D0_cm2_per_s == pytest.approx(D0, rel=1e-12)
    for T, run, D in zip(temps, ct.runs, ct.D_cm2_per_s):
        expect = D0 * math.exp(-0.25 / (K_B_EV * T))
        assert D == pytest.approx(expect, rel=1e-12)
        assert run.truth.D_cm2_per_s == pytest.approx(expect, rel=1e-12)
        assert run.trajectory.temperature_K == T
        assert run.truth.vibration_rms_A == pytest.approx(0.1 * math.sqrt(T / 300), rel=1e-12)
    assert ct.D300_cm2_per_s == pytest.approx(D0 * math.exp(-0.25 / (K_B_EV * 300)), rel=1e-12)
    assert ct.D_at(300) == pytest.approx(ct.D300_cm2_per_s, rel=1e-12)
    assert np.allclose(ct.D_at([500, 1000]), ct.D_cm2_per_s[[0, 2]], rtol=1e-12)
    # independent seeds per temperature, reproducible campaign
    again = arrhenius_campaign(temperatures_K=temps, Ea_eV=0.25, attempt_frequency_THz=8.0,
                               n_ions=20, n_frames=200, jump_distance_A=2.2, seed=3)
    assert np.array_equal(ct.runs[1].trajectory.positions, again.runs[1].trajectory.positions)
    assert not np.array_equal(ct.runs[0].truth.initial_site_of_atom,
                              ct.runs[1].truth.initial_site_of_atom)
    assert ct.to_dict()["temperatures_K"] == list(map(float, temps))


# ----------------------------------------------------------------------------- writers
def lattice_offset(a, b, cell):
    """Largest distance of a − b from a lattice vector of ``cell`` (Å), per frame and atom."""
    f = (a - b) @ np.linalg.inv(cell)
    return float(np.max(np.linalg.norm((f - np.round(f)) @ cell, axis=-1)))


@pytest.fixture(scope="module")
def small_runs():
    hop = hopping_run(n_ions=20, n_frames=80, temperature_K=1000, framework={"P": 2, "S": 8},
                      seed=1)
    tri = vacancy_kmc_run(lattice="triangular", cells_per_side=5, n_replicas=2,
                          n_vacancy_jumps=200, save_every=5, seed=1)  # a skewed cell
    return {"hop": hop, "tri": tri}


@pytest.mark.parametrize("which", ["hop", "tri"])
@pytest.mark.parametrize("fmt, ase_format", [("xdatcar", "vasp-xdatcar"), ("extxyz", "extxyz"),
                                             ("lammpsdump", "lammps-dump-text")])
def test_written_files_read_by_ase(tmp_path, small_runs, which, fmt, ase_format):
    # ASE (a general-purpose reader) sees the generated positions, up to whole cells.
    import ase.io

    run = small_runs[which]
    path = write_run(run, tmp_path, fmt=fmt)
    assert path.endswith(".gz") and os.path.isfile(path + ".runcard.toml")
    images = ase.io.read(path, index=":", format=ase_format)
    traj = run.trajectory
    assert len(images) == traj.n_frames
    assert images[0].get_chemical_symbols() == list(traj.species)
    cell = traj.cells[0]
    assert np.allclose([im.cell.array for im in images], cell, atol=1e-6)
    pos = np.array([im.positions for im in images])
    assert lattice_offset(pos, traj.positions, cell) < 1e-6


@pytest.mark.parametrize("which", ["hop", "tri"])
@pytest.mark.parametrize("fmt", ["xdatcar", "extxyz", "lammpsdump"])
@pytest.mark.parametrize("compress", [True, False])
def test_write_run_round_trip_through_readers(tmp_path, small_runs, which, fmt, compress):
    from diffkit import read_trajectory

    run = small_runs[which]
    path = write_run(run, tmp_path, fmt=fmt, compress=compress, name="run")
    assert path.endswith(".gz") == compress
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the run card must supply everything the file lacks
        back = read_trajectory(path)
    traj = run.trajectory
    assert list(back.species) == list(traj.species)
    assert back.frame_interval_ps == pytest.approx(traj.frame_interval_ps, rel=1e-8)
    assert np.allclose(back.times_ps - back.times_ps[0], traj.times_ps, rtol=1e-8, atol=1e-9)
    assert back.temperature_K == traj.temperature_K
    assert np.allclose(back.cells, traj.cells, atol=1e-6)
    # unwrapped positions: the generated ones, each atom shifted by one fixed lattice vector
    d = back.positions - traj.positions
    assert lattice_offset(d[:1], 0.0, traj.cells[0]) < 1e-6
    assert np.max(np.abs(d - d[:1])) < 1e-6


def test_default_box_keeps_fast_runs_unwrappable(tmp_path):
    # many hops per frame: the default box grows so a wrapped XDATCAR still unwraps
    from diffkit import read_trajectory

    run = hopping_run(n_ions=30, n_frames=150, frame_interval_ps=0.5, temperature_K=1500,
                      Ea_eV=0.15, vibration_rms_A=0.2, seed=6)
    steps = np.linalg.norm(np.diff(run.trajectory.positions, axis=0), axis=2)
    assert steps.max() > 2 * run.truth.jump_distance_A  # several hops between frames happen
    back = read_trajectory(write_run(run, tmp_path, fmt="xdatcar"))
    d = back.positions - run.trajectory.positions
    assert np.max(np.abs(d - d[:1])) < 1e-6


def test_xdatcar_refused_when_frames_too_far_apart(tmp_path):
    with pytest.warns(DiffkitWarning, match="could not be unwrapped"):
        run = hopping_run(n_ions=10, n_frames=50, frame_interval_ps=2.0, temperature_K=1500,
                          cells_per_side=3, seed=0)
    with pytest.raises(UsageError, match="cannot write this run as XDATCAR"):
        write_run(run, tmp_path, fmt="xdatcar")
    assert not any(p.name.endswith(".xdatcar.gz") for p in tmp_path.iterdir())
    path = write_run(run, tmp_path, fmt="extxyz")  # unwrapped coordinates are fine
    assert os.path.isfile(path)


# ----------------------------------------------------------------------------- bad arguments
@pytest.mark.parametrize("call, pattern", [
    (lambda: hopping_run(attempt_frequency_THz=-1.0), "attempt_frequency_THz must be positive"),
    (lambda: hopping_run(n_ions=0), "n_ions must be at least 1"),
    (lambda: hopping_run(n_ions=2.5), "n_ions must be a whole number"),
    (lambda: hopping_run(lattice="hcp"), "unknown lattice 'hcp'.*sc, square, sites"),
    (lambda: hopping_run(temperature_K=-5), "temperature_K must be positive"),
    (lambda: hopping_run(Ea_eV=-0.1), "Ea_eV must be zero or positive"),
    (lambda: hopping_run(frame_interval_ps=0), "frame_interval_ps must be positive"),
    (lambda: hopping_run(vibration_rms_A=float("nan")), "vibration_rms_A must be a finite"),
    (lambda: hopping_run(lattice="sites"), "needs sites="),
    (lambda: hopping_run(vibration_period_frames=2.0), "vibration_period_frames must exceed 2"),
    (lambda: hopping_run(vibration_period_frames=-3), "vibration_period_frames must be positive"),
    (lambda: hopping_run(vibration_period_frames=10, vibration_damping=1.0),
     "vibration_damping must lie strictly between 0 and 1"),
    (lambda: hopping_run(vibration_damping=0.9), "vibration_damping needs vibration_period"),
    (lambda: hopping_run(lattice="sites", sites=[[0, 0, 0]], cell=3.0, neighbour_cutoff_A=1.0),
     "no two sites"),
    (lambda: hopping_run(framework={"Li": 3}), "also the mobile species"),
    (lambda: hopping_run(framework={"Xx": 3}), "element symbol"),
    (lambda: hopping_run(seed=-1), "seed must be"),
    (lambda: vacancy_kmc_run(jump_rate_per_ps=-2.0), "jump_rate_per_ps must be positive"),
    (lambda: vacancy_kmc_run(lattice="diamond"), "unknown lattice 'diamond'"),
    (lambda: vacancy_kmc_run(n_replicas=0), "n_replicas must be at least 1"),
    (lambda: vacancy_kmc_run(n_vacancy_jumps=101, save_every=10), "multiple of save_every"),
    (lambda: arrhenius_campaign(temperatures_K=(500, -3)), "positive temperatures"),
    (lambda: write_run(hopping_run(n_ions=2, n_frames=3), "/nonexistent-never", fmt="pdb"),
     "unknown format 'pdb'"),
])
def test_bad_arguments_raise_usage_error(call, pattern):
    with pytest.raises(UsageError, match=pattern):
        call()
