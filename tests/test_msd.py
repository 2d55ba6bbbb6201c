"""Tests of diffkit.msd: the FFT MSD against the direct double loop, and MSD statistics.

Outside references:
- the direct time-origin double loop (the definition of the time-averaged MSD;
  Allen & Tildesley, *Computer Simulation of Liquids*, MSD section) — lives here only;
- the non-Gaussian parameter of an uncorrelated jump process, alpha2(t) = 3/(5 Γ t)
  for simple-cubic jumps without vibration (derived from the cumulants of a compound
  Poisson process; common practice);
- the Qian–Sheetz–Elson variance of the time-averaged MSD of a random walk
  (Qian, Sheetz & Elson, Biophys. J. 60, 910 (1991); 2D formula, x 2/d in d
  dimensions — shared/REFERENCES.md, "MSD statistics").
"""

import json

import numpy as np
import pytest

from diffkit.errors import InputError, UsageError
from diffkit.msd import ChargeMSDCurve, MSDCurve, compute_charge_msd, compute_msd, thinned_lags
from diffkit.synth import hopping_run
from diffkit.trajectory import Trajectory


# --------------------------------------------------------------------------- direct references
def direct_tensor(x, max_lag):
    """<Δr_a Δr_b> over all origins and atoms, x (n_frames, n_atoms, 3): (max_lag+1, 3, 3)."""
    out = np.zeros((max_lag + 1, 3, 3))
    for m in range(1, max_lag + 1):
        d = x[m:] - x[:-m]
        out[m] = np.einsum("tka,tkb->ab", d, d) / (d.shape[0] * d.shape[1])
    return out


def direct_r4(x, lags):
    """<|Δr|^2> and <|Δr|^4> over all origins and atoms at the given lags."""
    r2, r4 = [], []
    for m in lags:
        d = x[m:] - x[:-m]
        s = np.einsum("tka,tka->tk", d, d)
        r2.append(s.mean())
        r4.append((s * s).mean())
    return np.array(r2), np.array(r4)


@pytest.fixture(scope="module")
def framework_run():
    return hopping_run(n_ions=12, n_frames=401, Ea_eV=0.25, framework={"P": 3, "S": 5}, seed=7)


def _close(a, b, rtol=1e-9, atol_scale=1e-12):
    scale = max(np.max(np.abs(b)), 1e-300)
    np.testing.assert_allclose(a, b, rtol=rtol, atol=atol_scale * scale)


# --------------------------------------------------------------------------- FFT = direct loop
def test_fft_msd_equals_direct_double_loop(framework_run):
    traj = framework_run.trajectory
    c = compute_msd(traj, "Li", reference="framework")
    ref_name, track = traj.reference_track("framework", "Li")
    assert c.reference == ref_name == "framework"
    x = traj.positions[:, traj.indices("Li")] - track[:, None, :]
    L = len(c.lag_ps) - 1
    ref = direct_tensor(x, L)
    _close(c.msd_tensor_A2, ref)
    _close(c.msd_axes_A2, np.diagonal(ref, axis1=1, axis2=2))
    _close(c.msd_A2, np.trace(ref, axis1=1, axis2=2))
    # collective: MSD of the summed displacement, divided by the number of ions
    coll = direct_tensor(x.sum(axis=1, keepdims=True), L)
    _close(c.collective_A2, np.trace(coll, axis1=1, axis2=2) / c.n_ions)
    # per-ion curves on the thinned grid
    for i in (0, 5, 11):
        ri = direct_tensor(x[:, i:i + 1], L)
        _close(c.ion_msd_A2[i], np.trace(ri, axis1=1, axis2=2)[c.ion_lag_index])
    np.testing.assert_array_equal(c.n_origins, traj.n_frames - np.arange(L + 1))
    np.testing.assert_allclose(c.lag_ps, np.arange(L + 1) * traj.frame_interval_ps)
    assert c.n_ions == 12 and c.species == ("Li",)


def test_block_size_does_not_change_the_result(framework_run):
    traj = framework_run.trajectory
    a = compute_msd(traj, "Li", reference="none")
    b = compute_msd(traj, "Li", reference="none", memory_budget_MB=1e-3)   # one atom per block
    _close(b.msd_tensor_A2, a.msd_tensor_A2, rtol=1e-12)
    _close(b.ion_msd_A2, a.ion_msd_A2, rtol=1e-12)
    _close(b.collective_A2, a.collective_A2, rtol=1e-12)


def test_precision_far_from_the_origin():
    # positions 1e4 Å from the origin: subtracting each atom's mean keeps 1e-9 relative
    rng = np.random.default_rng(3)
    x = np.cumsum(rng.normal(0, 0.05, size=(300, 4, 3)), axis=0) + 1e4
    traj = Trajectory(["Na"] * 4, np.arange(300) * 0.01, np.eye(3) * 3e4, x)
    c = compute_msd(traj, "Na", reference="none", per_ion=False, tensor=False)
    ref = direct_tensor(x, len(c.lag_ps) - 1)
    _close(c.msd_A2[1:], np.trace(ref, axis1=1, axis2=2)[1:], rtol=1e-9, atol_scale=0)


def test_several_species_averaged_together(framework_run):
    traj = framework_run.trajectory
    c = compute_msd(traj, ["P", "S"], reference="none", per_ion=False)
    idx = np.concatenate([traj.indices("P"), traj.indices("S")])
    ref = direct_tensor(traj.positions[:, np.sort(idx)], len(c.lag_ps) - 1)
    _close(c.msd_A2, np.trace(ref, axis1=1, axis2=2))
    assert c.species == ("P", "S") and c.n_ions == 8
    assert c.ion_msd_A2 is None and c.alpha2 is None and not c.has_per_ion


def test_alpha2_direct_sum_equals_the_definition(framework_run):
    traj = framework_run.trajectory
    c = compute_msd(traj, "Li", reference="none", alpha2_origin_density=10**9)
    x = traj.positions[:, traj.indices("Li")]
    r2, r4 = direct_r4(x, c.alpha2_lag_index)
    _close(c.msd4_A4, r4)
    _close(c.alpha2, 3 * r4 / (5 * r2 ** 2) - 1)


def test_alpha2_of_simple_cubic_jumps():
    # alpha2(t) = 3/(5 Γ_total t) for uncorrelated sc jumps without vibration (compound
    # Poisson cumulants, derived; common practice). Statistical check at a few lags.
    run = hopping_run(n_ions=400, n_frames=2000, Ea_eV=0.25, vibration_rms_A=0.0, seed=11)
    c = compute_msd(run.trajectory, "Li", reference="none", tensor=False)
    rate = run.truth.total_rate_per_ps
    t = c.alpha2_lag_ps
    sel = (t * rate > 0.5) & (t * rate < 5)
    assert sel.sum() >= 3
    expected = 3.0 / (5.0 * rate * t[sel])
    np.testing.assert_allclose(c.alpha2[sel], expected, rtol=0.1)


def test_alpha2_near_zero_for_gaussian_walks():
    rng = np.random.default_rng(5)
    x = np.cumsum(rng.normal(0, 0.2, size=(2000, 100, 3)), axis=0)
    traj = Trajectory(["Li"] * 100, np.arange(2000) * 0.1, np.eye(3) * 1e3, x)
    c = compute_msd(traj, "Li", reference="none", tensor=False)
    short = c.alpha2_lag_ps <= 2.0
    assert np.all(np.abs(c.alpha2[short]) < 0.02)


# --------------------------------------------------------------------------- statistics vs QSE
def qse_relative_variance(n, K, d=3):
    """Qian, Sheetz & Elson (1991) var/mean^2 of the time-averaged MSD, x 2/d (REFERENCES.md)."""
    if n <= K:
        r = (4 * n * n * K + 2 * K + n - n ** 3) / (6 * n * K * K)
    else:
        r = 1 + (K ** 3 - 4 * n * K * K + 4 * n - K) / (6 * n * n * K)
    return r * 2.0 / d


def test_spread_of_time_averaged_msd_matches_qian_sheetz_elson():
    # 3000 independent Gaussian random walks as "ions"; the per-ion curves are the
    # time-averaged MSDs of single walks, whose spread QSE predicts.
    n_walks, n_frames, s = 3000, 64, 0.3
    rng = np.random.default_rng(2024)
    x = np.cumsum(rng.normal(0, s, size=(n_frames, n_walks, 3)), axis=0)
    traj = Trajectory(["Li"] * n_walks, np.arange(n_frames) * 1.0, np.eye(3) * 1e4, x)
    c = compute_msd(traj, "Li", reference="none", max_lag_fraction=0.95, tensor=False)
    grid = c.ion_lag_index
    for target in (1, 4, 16, 40, 55):          # both branches of QSE: n <= K and n >= K
        j = int(np.argmin(np.abs(grid - target)))
        n = int(grid[j])
        vals = c.ion_msd_A2[:, j]
        K = n_frames - n
        rho = 3 * s * s * n
        predicted = qse_relative_variance(n, K) * rho ** 2
        var = vals.var(ddof=1)
        # Monte Carlo error of a sample variance: sqrt((m4 - var^2) / N)
        m4 = np.mean((vals - vals.mean()) ** 4)
        mc_sd = np.sqrt((m4 - var ** 2) / n_walks)
        assert abs(var - predicted) < 4 * mc_sd, (n, var, predicted, mc_sd)
        assert abs(vals.mean() - rho) < 4 * vals.std() / np.sqrt(n_walks)


# --------------------------------------------------------------------------- charge MSD
def test_charge_msd_direct_and_independent_of_reference_when_neutral(framework_run):
    traj = framework_run.trajectory
    q = {"Li": 1.0, "P": 5.0, "S": -(12 + 15) / 5.0}     # 12 + 3*5 - 5*5.4 = 0: neutral
    none = compute_charge_msd(traj, q, reference="none")
    allr = compute_charge_msd(traj, q, reference="all")
    assert isinstance(none, ChargeMSDCurve)
    assert abs(none.net_charge_e) < 1e-12
    _close(allr.charge_msd_e2A2, none.charge_msd_e2A2, rtol=1e-9)
    qa = np.array([q[s] for s in traj.species])
    J = np.einsum("tka,k->ta", traj.positions, qa)[:, None, :]
    ref = direct_tensor(J, len(none.lag_ps) - 1)
    _close(none.charge_msd_e2A2, np.trace(ref, axis1=1, axis2=2))
    # a non-neutral selection depends on the reference, and it is recorded
    li = compute_charge_msd(traj, {"Li": 1}, reference="framework")
    assert li.reference == "framework" and li.net_charge_e == 12


def test_charge_msd_bad_charges(framework_run):
    with pytest.raises(UsageError, match="charge"):
        compute_charge_msd(framework_run.trajectory, {"Li": "plus one"})
    with pytest.raises(UsageError, match="dict"):
        compute_charge_msd(framework_run.trajectory, [1.0])
    with pytest.raises(InputError, match="present: Li, P, S"):
        compute_charge_msd(framework_run.trajectory, {"Na": 1})


# --------------------------------------------------------------------------- bad input and output
def test_species_absent_lists_present(framework_run):
    with pytest.raises(InputError, match=r"'Na'.*present: Li, P, S"):
        compute_msd(framework_run.trajectory, "Na")
    with pytest.raises(InputError, match="present"):
        compute_msd(framework_run.trajectory, ["Li", "K"])


def test_bad_options_and_single_frame(framework_run):
    traj = framework_run.trajectory
    with pytest.raises(UsageError, match="max_lag_fraction"):
        compute_msd(traj, "Li", max_lag_fraction=0)
    with pytest.raises(UsageError, match="memory_budget_MB"):
        compute_msd(traj, "Li", memory_budget_MB=-1)
    with pytest.raises(UsageError, match="reference"):
        compute_msd(traj, "Li", reference="centre")
    one = Trajectory(["Li"], [0.0], np.eye(3) * 5, np.zeros((1, 1, 3)))
    with pytest.raises(InputError, match="at least 2 frames"):
        compute_msd(one, "Li")


def test_default_reference_and_json(framework_run):
    c = compute_msd(framework_run.trajectory, "Li")
    assert c.reference == "framework"          # DESIGN.md: framework where there is one
    only = hopping_run(n_ions=3, n_frames=50, seed=1)
    assert compute_msd(only.trajectory, "Li").reference == "none"
    d = json.loads(json.dumps(c.to_dict()))
    assert d["reference"] == "framework" and len(d["msd_A2"]) == len(c.lag_ps)
    assert "MSDCurve(" in repr(c) and "framework" in repr(c)
    assert isinstance(c, MSDCurve)


def test_thinned_lags_grid():
    g = thinned_lags(10_000)
    assert g[0] == 1 and g[-1] == 10_000 and np.all(np.diff(g) > 0)
    assert np.array_equal(g[:16], np.arange(1, 17)) and len(g) < 130
    assert np.array_equal(thinned_lags(5), np.arange(1, 6))
    assert len(thinned_lags(0)) == 0
