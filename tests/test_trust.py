"""Checks of the run verdict (diffkit.trust).

References outside the module: the hopping generator's exact D and hop rate
(diffkit.synth, Einstein relation D = Γ_total a²/(2d), Mehrer, Diffusion in
Solids, 2007, ch. 4); the Poisson upper limit from scipy.stats (its defining
property P(X ≤ k | N_up) = 1 − confidence, and the standard closed form
½ χ²_{2(k+1)}, common practice); the kinetic temperature from ASE's
Atoms.get_temperature (general-purpose reference computation); the calibrated
effective-hop scaling (benchmarks/calibrate_hop_scaling.py) for the advised
extension.
"""

import json
import math

import numpy as np
import pytest
from scipy import constants, stats

from diffkit.errors import InputError, UsageError
from diffkit.synth import hopping_run
from diffkit.trajectory import Trajectory
from diffkit.trust import (RSD_A, RSD_B, TrustThresholds, VERDICTS, assess_run,
                           kinetic_temperature_K, poisson_upper_limit)
from diffkit.units import K_B_EV_PER_K

T_K = 600.0
NU_THZ = 10.0
DT_PS = 0.1


def _Ea_for_residence(frames):
    """Ea for a mean residence of ``frames`` frames on the simple cubic lattice (z = 6)."""
    return K_B_EV_PER_K * T_K * math.log(6 * NU_THZ * frames * DT_PS)


def _run(n_ions, n_frames, residence, seed, **kw):
    return hopping_run(n_ions=n_ions, n_frames=n_frames, frame_interval_ps=DT_PS,
                       temperature_K=T_K, Ea_eV=_Ea_for_residence(residence),
                       attempt_frequency_THz=NU_THZ, jump_distance_A=2.0, seed=seed, **kw)


def _status(assessment):
    return {c.name: c.status for c in assessment.checks}


# --------------------------------------------------------------------------- verdicts
def test_long_fast_run_is_solid():
    run = _run(60, 4000, 20, seed=1, vibration_rms_A=0.15, framework={"P": 16})
    a = assess_run(run.trajectory, "Li")
    assert a.verdict == "solid", a
    st = _status(a)
    assert all(s in ("pass", "skipped") for s in st.values()), st
    assert st["hops"] == st["diffusive"] == st["converged"] == st["host_stable"] == "pass"
    assert not a.diffusion.is_upper_bound
    # D against the generator's exact value (Einstein relation), within 4 standard errors
    d = a.diffusion
    assert abs(d.D_cm2_per_s - run.truth.D_cm2_per_s) < 4 * d.D_stderr_cm2_per_s
    assert a.suggested_extension_ps is None
    assert a.advice and a.advice[0].startswith("All checks passed")
    json.dumps(a.to_dict())
    assert "SOLID" in repr(a)


def test_short_run_with_a_handful_of_hops_is_tentative_with_extension_advice():
    # 50 ions for 99.9 ps at Γ_total = 0.006/ps: about 30 hops expected
    n_ions, n_frames = 50, 1000
    t_run = (n_frames - 1) * DT_PS
    residence = n_ions * t_run / 30 / DT_PS
    run = _run(n_ions, n_frames, residence, seed=2, vibration_rms_A=0.15)
    a = assess_run(run.trajectory, "Li")
    assert a.verdict in ("tentative", "inadequate")
    assert _status(a)["hops"] in ("warn", "fail")
    assert any(s.startswith("Extend the run by about") for s in a.advice)
    # prediction from the calibration and the truth: uncorrelated hops give
    # E[N_eff] = N_ions Γ_total t, so the target needs (A/(target − B))² / (N_ions Γ_total) ps
    target = a.thresholds.target_relative_error
    need = (RSD_A / (target - RSD_B)) ** 2
    predicted = need / (n_ions * run.truth.total_rate_per_ps) - t_run
    assert predicted > 0
    assert 0.5 * predicted < a.suggested_extension_ps < 2.0 * predicted


def test_too_few_hops_give_a_poisson_upper_bound_not_a_fit():
    n_ions, n_frames = 40, 1000
    t_run = (n_frames - 1) * DT_PS
    residence = n_ions * t_run / 3 / DT_PS           # about 3 hops in the run
    run = _run(n_ions, n_frames, residence, seed=3, vibration_rms_A=0.15)
    a = assess_run(run.trajectory, "Li")
    d = a.diffusion
    assert d.is_upper_bound
    assert a.verdict == "inadequate"
    assert _status(a)["hops"] == "fail"
    k = a.hops.total_hops
    # one-sided 95% Poisson limit on the hop count, converted with D = N a² / (2 d N_ions t)
    n_up = stats.chi2.ppf(0.95, 2 * (k + 1)) / 2
    bound = n_up * a.jump_distance_A ** 2 / (6 * n_ions * t_run)
    assert d.D_A2_per_ps == pytest.approx(bound, rel=1e-12)
    assert d.D_interval95_A2_per_ps == (0.0, pytest.approx(bound))
    assert math.isnan(d.D_stderr_cm2_per_s)
    assert "95% confidence" in d.message and "Poisson" in d.message
    # the bound is above the true D (it fails in 5% of runs; this seed is not one of them)
    assert d.D_cm2_per_s > run.truth.D_cm2_per_s
    assert a.jump_distance_A == pytest.approx(2.0, rel=0.15)


def test_no_hop_at_all_bound_uses_minus_log_005():
    run = hopping_run(n_ions=30, n_frames=800, Ea_eV=5.0, vibration_rms_A=0.1, seed=4)
    a = assess_run(run.trajectory, "Li")
    assert a.hops.total_hops == 0
    assert a.poisson_upper_hops == pytest.approx(-math.log(0.05))
    assert a.diffusion.is_upper_bound
    t_run = run.trajectory.duration_ps
    # a = 0.6-threshold basis: the shortest distance between the ions' resting places (2 Å)
    assert a.jump_distance_A == pytest.approx(2.0, rel=0.1)
    expected = -math.log(0.05) * a.jump_distance_A ** 2 / (6 * 30 * t_run)
    assert a.diffusion.D_A2_per_ps == pytest.approx(expected)
    assert any("No hop was seen" in s and "at least" in s for s in a.advice)
    assert a.verdict == "inadequate"


def test_poisson_upper_limit_against_scipy():
    # k = 0: −ln(0.05) = χ²_2(0.95)/2 (standard result, common practice)
    assert poisson_upper_limit(0) == pytest.approx(-math.log(0.05), rel=1e-12)
    assert poisson_upper_limit(0) == pytest.approx(stats.chi2.ppf(0.95, 2) / 2, rel=1e-12)
    for k in range(1, 12):
        up = poisson_upper_limit(k, 0.95)
        # defining property of the one-sided upper limit
        assert stats.poisson.cdf(k, up) == pytest.approx(0.05, rel=1e-9)
    assert poisson_upper_limit(3, 0.9) < poisson_upper_limit(3, 0.95)
    with pytest.raises(UsageError, match="k"):
        poisson_upper_limit(-1)


# --------------------------------------------------------------------------- host
def test_melting_framework_fails_loudly():
    run = _run(40, 2000, 20, seed=5, vibration_rms_A=0.15, framework={"P": 12, "S": 24})
    tr = run.trajectory
    pos = tr.positions.copy()
    host = np.flatnonzero(tr.species != "Li")
    rng = np.random.default_rng(0)
    # the framework random-walks: 0.05 Å rms per axis per frame, like a liquid
    pos[:, host] = pos[0, host] + np.cumsum(rng.normal(0, 0.05, (tr.n_frames, len(host), 3)),
                                            axis=0)
    melted = Trajectory(tr.species, tr.times_ps, tr.cells, pos, temperature_K=tr.temperature_K)
    a = assess_run(melted, "Li")
    host_check = a.check("host_stable")
    assert host_check.status == "fail"
    # expected growth of a random walk's MSD from 1/4 to 1/2 of the run: 3 s² Δm (s = 0.05)
    m_end = (tr.n_frames - 1) // 2
    assert host_check.figure == pytest.approx(3 * 0.05 ** 2 * (m_end - m_end // 2), rel=0.25)
    assert a.verdict == "inadequate"
    assert a.advice[0].startswith("THE HOST STRUCTURE IS NOT STABLE")
    assert "meaningless" in a.advice[0] and "room temperature" in a.advice[0]


def test_stable_framework_passes_host_check():
    run = _run(30, 1500, 20, seed=6, vibration_rms_A=0.2, framework={"P": 10})
    a = assess_run(run.trajectory, "Li", check_halves=False)
    assert a.check("host_stable").status == "pass"
    assert a.check("converged").status == "skipped"


# --------------------------------------------------------------------------- equilibration
def _with_velocities(traj, T_of_frame, seed=0):
    """Same positions, Maxwell–Boltzmann velocities at temperature T_of_frame[t].

    Per-component sd sqrt(k_B T / m) in Å/ps, from CODATA constants (scipy).
    """
    rng = np.random.default_rng(seed)
    m_kg = traj.masses * constants.atomic_mass
    to_A_per_ps = constants.pico / constants.angstrom
    sd = np.sqrt(constants.k * T_of_frame[:, None] / m_kg[None, :]) * to_A_per_ps
    v = rng.normal(size=(traj.n_frames, traj.n_atoms, 3)) * sd[..., None]
    return Trajectory(traj.species, traj.times_ps, traj.cells, traj.positions, velocities=v,
                      masses=traj.masses, temperature_K=traj.temperature_K)


def test_kinetic_temperature_matches_ase():
    from ase import Atoms, units

    rng = np.random.default_rng(3)
    masses = np.array([6.94, 30.97, 32.06, 6.94])
    v = rng.normal(0, 10.0, (5, 4, 3))                      # Å/ps
    ours = kinetic_temperature_K(v, masses)
    for f in range(5):
        atoms = Atoms("LiPSLi", positions=np.zeros((4, 3)), masses=masses)
        atoms.set_velocities(v[f] / (1000.0 * units.fs))    # Å/ps -> Å per ASE time unit
        assert ours[f] == pytest.approx(atoms.get_temperature(), rel=1e-6)


def test_temperature_ramp_is_flagged_with_a_start():
    run = _run(40, 2000, 30, seed=7, vibration_rms_A=0.15, framework={"P": 20})
    n = run.trajectory.n_frames
    frac = np.arange(n) / (n - 1)
    T = np.where(frac < 0.3, 300.0 + 300.0 * frac / 0.3, 600.0)   # ramps for 30 % of the run
    traj = _with_velocities(run.trajectory, T)
    a = assess_run(traj, "Li", check_halves=False)
    eq = a.check("equilibrated")
    assert eq.status == "fail"
    t_run = traj.duration_ps
    assert a.suggested_start_ps == pytest.approx(0.3 * t_run, abs=0.1 * t_run)
    assert any(f"start_ps={a.suggested_start_ps:.3g}" in s for s in a.advice)
    # after the advised start the kinetic temperature is the nominal 600 K
    assert a.kinetic_temperature_K == pytest.approx(600.0, rel=0.02)
    assert a.check("temperature").status == "pass"


def test_steady_velocities_pass_and_wrong_nominal_temperature_is_flagged():
    run = _run(30, 1000, 30, seed=8, vibration_rms_A=0.15, framework={"P": 20})
    traj = _with_velocities(run.trajectory, np.full(run.trajectory.n_frames, 600.0))
    a = assess_run(traj, "Li", check_halves=False)
    assert a.check("equilibrated").status == "pass"
    assert a.suggested_start_ps is None
    assert a.check("temperature").status == "pass"
    hot = Trajectory(traj.species, traj.times_ps, traj.cells, traj.positions,
                     velocities=traj.velocities, masses=traj.masses, temperature_K=900.0)
    b = assess_run(hot, "Li", check_halves=False)
    assert b.check("temperature").status == "fail"
    assert "900" in b.check("temperature").explanation


def test_volume_drift_is_flagged():
    run = _run(30, 1200, 30, seed=9, vibration_rms_A=0.15)
    tr = run.trajectory
    scale = np.where(np.arange(tr.n_frames) < 400, 1.0 + 0.05 * (1 - np.arange(tr.n_frames) / 400),
                     1.0)
    cells = tr.cells * scale[:, None, None]
    traj = Trajectory(tr.species, tr.times_ps, cells, tr.positions, temperature_K=T_K)
    a = assess_run(traj, "Li", check_halves=False)
    eq = a.check("equilibrated")
    assert eq.status in ("warn", "fail")
    assert "volume" in eq.explanation
    assert a.suggested_start_ps is not None
    assert a.suggested_start_ps <= 0.5 * traj.duration_ps


# --------------------------------------------------------------------------- other checks
def test_diffusion_carried_by_two_ions_is_flagged():
    fast = _run(2, 2000, 15, seed=10, vibration_rms_A=0.1, cells_per_side=10)
    slow = hopping_run(n_ions=30, n_frames=2000, Ea_eV=5.0, vibration_rms_A=0.1,
                       cells_per_side=10, seed=11)
    np.testing.assert_allclose(fast.trajectory.cells, slow.trajectory.cells)
    pos = np.concatenate([fast.trajectory.positions, slow.trajectory.positions], axis=1)
    traj = Trajectory(["Li"] * 32, fast.trajectory.times_ps, fast.trajectory.cells, pos,
                      temperature_K=T_K)
    a = assess_run(traj, "Li", check_halves=False)
    hops = a.check("hops")
    assert hops.status in ("warn", "fail")
    assert "only 2 ion" in hops.explanation
    assert any("carried by 2 of 32 ions" in s for s in a.advice)


def test_run_whose_rate_changes_halfway_is_not_converged():
    first = _run(40, 2000, 10, seed=12, vibration_rms_A=0.1, cells_per_side=10)
    second = _run(40, 2000, 200, seed=13, vibration_rms_A=0.1, cells_per_side=10)
    p1, p2 = first.trajectory.positions, second.trajectory.positions
    pos = np.concatenate([p1, p2[1:] - p2[:1] + p1[-1:]], axis=0)   # continue the paths
    times = np.arange(len(pos)) * DT_PS
    traj = Trajectory(["Li"] * 40, times, first.trajectory.cells[0], pos, temperature_K=T_K)
    a = assess_run(traj, "Li")
    conv = a.check("converged")
    assert conv.status == "fail", conv
    assert any("first and second halves" in s for s in a.advice)


def test_hops_too_frequent_for_the_frame_interval_are_flagged():
    run = _run(20, 800, 2, seed=14, vibration_rms_A=0.1)     # a hop every 2 frames
    a = assess_run(run.trajectory, "Li", check_halves=False)
    assert a.check("hops_resolved").status == "fail"
    assert any(s.startswith("Save frames more often") for s in a.advice)


# --------------------------------------------------------------------------- bad input
@pytest.fixture(scope="module")
def small():
    return _run(10, 300, 20, seed=15, vibration_rms_A=0.1).trajectory


def test_species_absent(small):
    with pytest.raises(InputError, match="'Na'.*present: Li"):
        assess_run(small, "Na")


def test_single_frame_run():
    traj = Trajectory(["Li"], [0.0], np.eye(3) * 10, np.ones((1, 1, 3)), frame_interval_ps=0.1)
    with pytest.raises(InputError, match="single frame"):
        assess_run(traj, "Li")


@pytest.mark.parametrize("kwargs, word", [
    ({"min_effective_hops": -1}, "min_effective_hops"),
    ({"drift_warn": float("nan")}, "drift_warn"),
    ({"linearity_warn": 0.5, "linearity_fail": 0.2}, "linearity_warn"),
    ({"step_fraction_fail": 0.7}, "step_fraction_fail"),
    ({"min_fraction_ions_moved": 2.0}, "min_fraction_ions_moved"),
    ({"target_relative_error": 0.0}, "target_relative_error"),
    ({"confidence": 1.0}, "confidence"),
])
def test_nonsense_thresholds(kwargs, word):
    with pytest.raises(UsageError, match=word):
        TrustThresholds(**kwargs)


def test_nonsense_options_name_the_option(small):
    with pytest.raises(UsageError, match="host_growth_fail_A2"):
        assess_run(small, "Li", thresholds={"host_growth_warn_A2": 1.0,
                                            "host_growth_fail_A2": 1e4})
    with pytest.raises(UsageError, match="unknown threshold"):
        assess_run(small, "Li", thresholds={"min_hops": 3})
    with pytest.raises(UsageError, match="jump_distance_A"):
        assess_run(small, "Li", jump_distance_A=-2.0)
    with pytest.raises(UsageError, match="threshold_A"):
        assess_run(small, "Li", hop_threshold_A=1e3)
    assert VERDICTS == ("solid", "tentative", "inadequate")


def test_halves_comparison_allows_for_few_ions():
    # Welch's t with Welch–Satterthwaite degrees of freedom (Welch, Biometrika 34, 28 (1947));
    # the reference p-value comes from scipy.stats (common practice).
    from scipy import stats

    from diffkit.trust import _normal_equivalent

    t, s1, s2, n1, n2 = 3.0, 1.0, 1.2, 15, 15
    z = _normal_equivalent(t, s1, n1, s2, n2)
    nu = (s1**2 + s2**2) ** 2 / (s1**4 / n1 + s2**4 / n2)
    assert stats.norm.sf(z) == pytest.approx(stats.t.sf(t, nu), rel=1e-9)
    assert z < t  # heavier tails: the same difference is less surprising
    assert _normal_equivalent(t, s1, 1e9, s2, 1e9) == pytest.approx(t, rel=1e-6)


def test_running_estimate_and_progress():
    # the running estimate ends at the whole-run estimate; every part brackets the exact D
    # of the hopping model (Einstein relation; Mehrer, Diffusion in Solids, ch. 4) within
    # a generous margin
    from diffkit.synth import hopping_run
    from diffkit.trust import assess_run

    run = hopping_run(n_ions=24, n_frames=2000, frame_interval_ps=0.02, temperature_K=900,
                      Ea_eV=0.3, jump_distance_A=2.2, framework={"B": 4, "S": 8}, seed=4)
    seen = []
    a = assess_run(run.trajectory, "Li", progress=lambda done, total: seen.append((done, total)))
    assert seen[-1] == (5, 5) and len(seen) == 5
    r = a.running
    assert len(r.times_ps) == 4 and r.times_ps[-1] == pytest.approx(run.trajectory.duration_ps)
    assert r.D_cm2_per_s[-1] == a.diffusion.D_cm2_per_s
    truth = run.truth.D_cm2_per_s
    for lo, hi in zip(r.lower_cm2_per_s, r.upper_cm2_per_s):
        width = hi - lo
        assert lo - width < truth < hi + width
