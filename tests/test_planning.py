"""Tests of diffkit.planning: run lengths and temperatures for a target precision at 300 K.

Outside references used here:
* the straight line through two points (Lagrange interpolation) and the Cauchy–Schwarz
  optimum of Σ c_i t_i subject to Σ α_i² A²/(r_i t_i) = ε² (analytic);
* Elfving's theorem: a c-optimal design for a two-parameter linear model needs at most
  two support points (G. Elfving, Ann. Math. Statist. 23, 255 (1952); from memory);
* numpy.polyfit with weights and cov="unscaled" as the reference weighted least squares;
* the Einstein relation D = Γ_total a²/(2d) of uncorrelated hops (Mehrer, Diffusion in
  Solids, 2007, ch. 4), which also gives N_eff = n·2d·D·t/a² = expected hops
  (He, Zhu, Epstein & Mo, npj Comput. Mater. 4, 18 (2018));
* Nernst–Einstein σ = n q² D/(V k_B T) with CODATA constants from scipy.constants;
* synthetic campaigns from diffkit.synth with known D(300 K) (the slow check).
"""

import itertools
import json
import math
import warnings

import numpy as np
import pytest
from scipy import constants as C

from diffkit.errors import DiffkitWarning, InputError, UsageError
from diffkit.trust import TrustThresholds
from diffkit.planning import (HE_2018_PRECISION, PrecisionModel, default_precision_model,
                              extrapolation_precision, plan_campaign)

K_B_EV = C.k / C.e              # Boltzmann constant in eV/K (CODATA via scipy)
A2PS_TO_CM2S = 1e-16 / 1e-12    # (1 Å)² / 1 ps in cm²/s: 1e-16 cm² per 1e-12 s


def _x(T):
    return 1.0 / (K_B_EV * np.asarray(T, dtype=float))


def _rate(T, *, Ea, D0_cm2_per_s, n_ions, a, d=3):
    """Expected N_eff per ps: n · 2d · D / a² with D in Å²/ps."""
    D_A2ps = D0_cm2_per_s * np.exp(-Ea * _x(T)) / A2PS_TO_CM2S
    return n_ions * 2 * d * D_A2ps / a ** 2


def _pair_optimum(T, rate, cost, x0, eps, A):
    """Closed-form cheapest two-temperature plan (line through two points, B = 0)."""
    x = _x(T)
    alpha = np.array([(x0 - x[1]) / (x[0] - x[1]), (x0 - x[0]) / (x[1] - x[0])])
    beta = A * np.abs(alpha) * np.sqrt(np.asarray(cost) / rate)
    total = beta.sum() ** 2 / eps ** 2
    lengths = total * (beta / beta.sum()) / np.asarray(cost)
    return lengths, total, alpha


def _polyfit_error(T, rel_err, T0):
    """Reference WLS through numpy.polyfit: stderr of ln D at T0 and of Ea."""
    x = _x(T)
    T = np.asarray(T, dtype=float)
    y = np.zeros(len(T))
    _, cov = np.polyfit(x, y + 0.01 * x, 1, w=1.0 / np.asarray(rel_err), cov="unscaled")
    g = np.array([float(_x(T0)), 1.0])
    return math.sqrt(g @ cov @ g), math.sqrt(cov[0, 0])


# --------------------------------------------------------------------------- analytic checks


def test_two_temperatures_match_the_closed_form_allocation():
    # line through two points + Cauchy–Schwarz (analytic)
    model = PrecisionModel(1.3, 0.0, "test")
    T, cost = [700.0, 1100.0], [1.0, 3.0]
    Ea, D0, n, a, eps = 0.35, 2e-3, 16, 2.5, 0.15
    plan = plan_campaign(Ea_eV=Ea, D0_cm2_per_s=D0, candidate_temperatures_K=T, n_ions=n,
                         jump_distance_A=a, target_relative_error=eps, min_temperatures=2,
                         min_effective_hops=0, min_hops_per_ion=0, precision=model,
                         cost_per_ps=cost)
    rate = _rate(T, Ea=Ea, D0_cm2_per_s=D0, n_ions=n, a=a)
    lengths, total, _ = _pair_optimum(T, rate, cost, float(_x(300.0)), eps, 1.3)
    assert plan.reachable
    np.testing.assert_allclose(plan.length_ps, lengths, rtol=1e-6)
    assert plan.total_cost == pytest.approx(total, rel=1e-6)
    assert plan.planned_relative_error == pytest.approx(eps, rel=1e-6)
    # Ea error of a line through two points: sqrt(s1² + s2²) / |x1 − x2|
    s = np.array([r.D_relative_error for r in plan.runs])
    x = _x(T)
    assert plan.planned_Ea_stderr_eV == pytest.approx(
        math.sqrt(np.sum(s ** 2)) / abs(x[0] - x[1]), rel=1e-6)


def test_search_finds_the_elfving_two_point_optimum():
    # Elfving (1952, from memory): the cheapest plan without length bounds and without
    # floor uses at most two temperatures, so it equals the best closed-form pair.
    model = PrecisionModel(1.1, 0.0, "test")
    T = [550.0, 650.0, 800.0, 950.0, 1150.0]
    cost = [1.0, 1.2, 1.5, 2.5, 6.0]   # hotter is dearer per ps
    Ea, D0, n, a, eps = 0.28, 3e-3, 24, 2.2, 0.1
    plan = plan_campaign(Ea_eV=Ea, D0_cm2_per_s=D0, candidate_temperatures_K=T, n_ions=n,
                         jump_distance_A=a, target_relative_error=eps, min_temperatures=2,
                         min_effective_hops=0, min_hops_per_ion=0, precision=model,
                         cost_per_ps=cost)
    rate = _rate(T, Ea=Ea, D0_cm2_per_s=D0, n_ions=n, a=a)
    x0 = float(_x(300.0))
    best = min(_pair_optimum([T[i], T[j]], rate[[i, j]], [cost[i], cost[j]], x0, eps, 1.1)[1]
               for i, j in itertools.combinations(range(len(T)), 2))
    assert plan.reachable
    assert plan.total_cost == pytest.approx(best, rel=1e-4)
    assert plan.total_cost >= best * (1 - 1e-6)


def test_planned_error_agrees_with_numpy_polyfit():
    # numpy.polyfit(w=1/σ, cov="unscaled") as the reference weighted least squares
    T = [600.0, 750.0, 900.0, 1100.0]
    rel = [0.08, 0.15, 0.05, 0.03]
    ref_lnD, ref_Ea = _polyfit_error(T, rel, 300.0)
    prec = extrapolation_precision(T, rel, target_temperature_K=300.0)
    assert prec.relative_error == pytest.approx(ref_lnD, rel=1e-9)
    assert prec.Ea_stderr_eV == pytest.approx(ref_Ea, rel=1e-9)
    # and inside a plan: the runs' RSDs carried to 300 K give the planned error
    plan = plan_campaign(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=T, n_ions=20,
                         jump_distance_A=2.0, target_relative_error=0.2)
    rsd = [r.D_relative_error for r in plan.runs]
    assert plan.planned_relative_error == pytest.approx(
        _polyfit_error(plan.temperatures_K, rsd, 300.0)[0], rel=1e-6)
    assert plan.planned_relative_error <= 0.2 * (1 + 1e-6)


def test_effective_hops_frame_interval_and_reference_D():
    # N_eff = n·2d·D·t/a² (He et al. 2018) and hops per ion = 2d·D·t/a² (Einstein relation)
    Ea, D0, n, a = 0.25, 5e-3, 12, 2.4
    plan = plan_campaign(Ea_eV=Ea, D0_cm2_per_s=D0, candidate_temperatures_K=[600, 800, 1000],
                         n_ions=n, jump_distance_A=a, target_relative_error=0.3)
    for r in plan.runs:
        D_A2ps = D0 * math.exp(-Ea / (K_B_EV * r.temperature_K)) / A2PS_TO_CM2S
        assert r.D_cm2_per_s == pytest.approx(D_A2ps * A2PS_TO_CM2S, rel=1e-12)
        assert r.effective_hops == pytest.approx(n * 6 * D_A2ps * r.length_ps / a ** 2, rel=1e-9)
        assert r.hops_per_ion == pytest.approx(r.effective_hops / n, rel=1e-9)
        assert r.effective_hops >= 50 * (1 - 1e-9) and r.hops_per_ion >= 3 * (1 - 1e-9)
        # 20 frames per mean residence time a²/(2d D), or finer if the run verdict's
        # hops_per_frame_warn asks for it
        per_frame = min(0.05, TrustThresholds().hops_per_frame_warn)
        assert r.max_frame_interval_ps == pytest.approx(per_frame * a ** 2 / (6 * D_A2ps),
                                                        rel=1e-9)
    # the same law given as D at 1000 K instead of D0
    D1000 = D0 * math.exp(-Ea / (K_B_EV * 1000.0))
    other = plan_campaign(Ea_eV=Ea, D_cm2_per_s=D1000, at_temperature_K=1000.0,
                          candidate_temperatures_K=[600, 800, 1000], n_ions=n,
                          jump_distance_A=a, target_relative_error=0.3)
    assert other.D0_cm2_per_s == pytest.approx(D0, rel=1e-12)
    np.testing.assert_allclose(other.length_ps, plan.length_ps, rtol=1e-6)
    assert plan.D_target_cm2_per_s == pytest.approx(D0 * math.exp(-Ea / (K_B_EV * 300)),
                                                    rel=1e-12)
    f = math.exp(1.959963984540054 * plan.planned_relative_error)  # normal 97.5% quantile
    lo, hi = plan.D_target_interval95_cm2_per_s
    assert lo == pytest.approx(plan.D_target_cm2_per_s / f, rel=1e-9)
    assert hi == pytest.approx(plan.D_target_cm2_per_s * f, rel=1e-9)


def test_sigma_band_from_nernst_einstein():
    # σ = n q² D / (V k_B T), CODATA constants from scipy.constants
    V, n = 1500.0, 24
    plan = plan_campaign(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=[600, 800, 1000],
                         n_ions=n, jump_distance_A=2.0, target_relative_error=0.25, volume_A3=V)
    D = plan.D_target_cm2_per_s * 1e-4                # m²/s
    sigma = n / (V * 1e-30) * C.e ** 2 * D / (C.k * 300.0) / 100.0   # S/m -> S/cm
    assert plan.sigma_target_S_per_cm == pytest.approx(sigma, rel=1e-9)
    lo, hi = plan.sigma_target_interval95_S_per_cm
    assert hi / plan.sigma_target_S_per_cm == pytest.approx(plan.interval95_factor, rel=1e-12)
    assert "mS/cm" in plan.to_text()


def test_ea_sensitivity_with_the_same_lengths():
    plan = plan_campaign(Ea_eV=0.3, D_cm2_per_s=1e-5, at_temperature_K=1000.0,
                         candidate_temperatures_K=[600, 800, 1000, 1200], n_ions=20,
                         jump_distance_A=2.0, target_relative_error=0.2)
    (ea_lo, err_lo), (ea_hi, err_hi) = plan.Ea_sensitivity
    assert ea_lo == pytest.approx(0.25) and ea_hi == pytest.approx(0.35)
    # recompute: same lengths, D(1000 K) held, RSD = A/sqrt(N_eff), polyfit propagation
    A = plan.precision_model.hop_coefficient
    B = plan.precision_model.relative_error_floor
    for ea, err in ((ea_lo, err_lo), (ea_hi, err_hi)):
        T = np.array(plan.temperatures_K)
        D = 1e-5 * np.exp(-ea * (_x(T) - _x(1000.0))) / A2PS_TO_CM2S
        neff = 20 * 6 * D * np.array(plan.length_ps) / 4.0
        ref = _polyfit_error(T, A / np.sqrt(neff) + B, 300.0)[0]
        assert err == pytest.approx(ref, rel=1e-6)
    assert err_lo < plan.planned_relative_error < err_hi   # slower ions, fewer hops


# --------------------------------------------------------------------------- limits


def test_floor_makes_a_target_unreachable():
    model = PrecisionModel(1.0, 0.05, "test floor")
    T = [600.0, 800.0, 1000.0]
    plan = plan_campaign(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=T, n_ions=20,
                         jump_distance_A=2.0, target_relative_error=0.1, precision=model)
    floor_limit = _polyfit_error(T, [0.05] * 3, 300.0)[0]   # every run at the floor
    assert floor_limit > 0.1
    assert not plan.reachable
    assert plan.limited_by == "relative error floor"
    assert plan.best_achievable_relative_error == pytest.approx(floor_limit, rel=1e-6)
    assert plan.runs == ()
    assert "NOT reachable" in plan.to_text() and "floor" in " ".join(plan.messages)
    # a looser target is reachable
    ok = plan_campaign(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=T, n_ions=20,
                       jump_distance_A=2.0, target_relative_error=1.2 * floor_limit,
                       precision=model)
    assert ok.reachable and ok.planned_relative_error <= 1.2 * floor_limit * (1 + 1e-6)


def test_maximum_length_makes_a_target_unreachable():
    T = [600.0, 800.0, 1000.0]
    model = PrecisionModel(1.1, 0.0, "test")
    plan = plan_campaign(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=T, n_ions=20,
                         jump_distance_A=2.0, target_relative_error=0.02, max_length_ps=100.0,
                         precision=model)
    assert not plan.reachable and plan.limited_by == "maximum simulation length"
    assert plan.length_ps == (100.0, 100.0, 100.0)
    rate = _rate(T, Ea=0.3, D0_cm2_per_s=4e-3, n_ions=20, a=2.0)
    ref = _polyfit_error(T, 1.1 / np.sqrt(rate * 100.0), 300.0)[0]
    assert plan.planned_relative_error == pytest.approx(ref, rel=1e-6)
    assert plan.best_achievable_relative_error == pytest.approx(ref, rel=1e-6)
    assert plan.planned_relative_error > 0.02


def test_slow_temperature_is_left_out_and_said():
    plan = plan_campaign(Ea_eV=0.5, D0_cm2_per_s=4e-3, candidate_temperatures_K=[400, 800, 1000,
                                                                                  1200],
                         n_ions=10, jump_distance_A=2.0, target_relative_error=0.5,
                         max_length_ps=200.0)
    slow = [c for c in plan.candidates if c.temperature_K == 400.0][0]
    assert not slow.usable and not slow.chosen
    assert any("400 K is too slow" in m for m in plan.messages)
    assert 400.0 not in plan.temperatures_K


def test_expensive_temperature_is_avoided():
    T = [600.0, 800.0, 1000.0, 1200.0]
    cheap = plan_campaign(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=T, n_ions=20,
                          jump_distance_A=2.0, target_relative_error=0.2)
    assert 1200.0 in cheap.temperatures_K
    dear = plan_campaign(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=T, n_ions=20,
                         jump_distance_A=2.0, target_relative_error=0.2,
                         cost_per_ps=[1.0, 1.0, 1.0, 50.0])
    assert 1200.0 not in dear.temperatures_K
    assert dear.total_cost < 50.0 * cheap.total_cost
    assert len(dear.temperatures_K) >= 3


# --------------------------------------------------------------------------- results, inputs


def test_result_is_json_ready_and_readable():
    plan = plan_campaign(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=[600, 800, 1000],
                         n_ions=20, jump_distance_A=2.0, target_relative_error=0.2)
    data = json.loads(json.dumps(plan.to_dict()))
    assert data["reachable"] is True
    assert data["length_ps"] == pytest.approx(list(plan.length_ps))
    assert data["runs"][0]["length_ps"] == pytest.approx(plan.runs[0].length_ps)
    assert data["planned_relative_error"] == pytest.approx(plan.planned_relative_error)
    text = plan.to_text()
    for r in plan.runs:
        assert f"{r.temperature_K:g}" in text
    assert "Planned relative error at 300 K" in text
    assert "CampaignPlan(" in repr(plan)


def test_precision_model():
    m = PrecisionModel(2.0, 0.05)
    assert m.relative_error(400) == pytest.approx(2.0 / 20 + 0.05)
    assert m.hops_needed(0.15) == pytest.approx(400.0)
    assert m.hops_needed(0.05) == math.inf
    assert m.relative_error(0) == math.inf
    # He, Zhu, Epstein & Mo (2018), constants from memory
    assert (HE_2018_PRECISION.hop_coefficient, HE_2018_PRECISION.relative_error_floor) == \
        (3.43, 0.04)
    with pytest.raises(UsageError):
        PrecisionModel(-1.0, 0.0)
    with pytest.raises(UsageError):
        PrecisionModel(1.0, -0.1)
    assert default_precision_model().relative_error_floor >= 0


BASE = dict(Ea_eV=0.3, D0_cm2_per_s=4e-3, candidate_temperatures_K=[600, 800, 1000], n_ions=20,
            jump_distance_A=2.0, target_relative_error=0.2)


@pytest.mark.parametrize("change, error, words", [
    (dict(Ea_eV=-0.1), InputError, "Ea_eV"),
    (dict(target_relative_error=0.0), InputError, "target_relative_error"),
    (dict(n_ions=10.5), InputError, "whole number"),
    (dict(jump_distance_A=0.0), InputError, "jump_distance_A"),
    (dict(candidate_temperatures_K=[600, -5, 900]), InputError, "entry 1"),
    (dict(candidate_temperatures_K=[900]), UsageError, "two candidate"),
    (dict(min_temperatures=4), UsageError, "min_temperatures"),
    (dict(D_cm2_per_s=1e-5, at_temperature_K=900), UsageError, "not both"),
    (dict(D0_cm2_per_s=None), UsageError, "at_temperature_K"),
    (dict(cost_per_ps=[1.0, 2.0]), InputError, "cost_per_ps"),
    (dict(cost_per_ps=[1.0, 0.0, 1.0]), InputError, "cost_per_ps"),
    (dict(dimension=4), InputError, "dimension"),
    (dict(precision=(1.0, 0.0)), UsageError, "PrecisionModel"),
    (dict(min_length_ps=10.0, max_length_ps=5.0), UsageError, "max_length_ps"),
    (dict(candidate_temperatures_K=list(range(500, 1800, 100))), UsageError, "at most"),
    (dict(target_quantity="conductance"), UsageError, "target_quantity"),
])
def test_bad_input(change, error, words):
    kwargs = {**BASE, **change}
    with pytest.raises(error, match=words):
        plan_campaign(**kwargs)


def test_suspicious_units_and_duplicates_warn():
    kw = {k: v for k, v in BASE.items() if k != "D0_cm2_per_s"}
    with pytest.warns(DiffkitWarning, match="Å²/ps"):
        plan_campaign(**kw, D_cm2_per_s=0.5, at_temperature_K=1000.0)
    with pytest.warns(DiffkitWarning, match="kJ/mol"):
        plan_campaign(**{**BASE, "Ea_eV": 30.0})
    with pytest.warns(DiffkitWarning, match="duplicate"):
        plan = plan_campaign(**{**BASE, "candidate_temperatures_K": [600, 800, 800, 1000]})
    assert len(plan.candidates) == 3


# --------------------------------------------------------------------------- synthetic check


@pytest.mark.slow
def test_planned_error_matches_synthetic_campaigns():
    """≥ 50 campaigns simulated as planned: RMS achieved error within ×1.5 of the plan.

    The hopping model's exact D(T) = D0 exp(−Ea/k_B T), D0 = z ν a²/(2d) (Einstein
    relation, Mehrer ch. 4), gives the true D(300 K) to compare with.
    """
    from diffkit.arrhenius import fit_arrhenius
    from diffkit.diffusion import estimate_diffusion
    from diffkit.msd import compute_msd
    from diffkit.synth import arrhenius_campaign

    Ea, nu, a, n = 0.3, 10.0, 2.0, 10
    D0 = 6 * nu * a * a / 6 * A2PS_TO_CM2S     # z ν a² / (2d), sc: z = 6, d = 3
    plan = plan_campaign(Ea_eV=Ea, D0_cm2_per_s=D0,
                         candidate_temperatures_K=[600, 700, 800, 1000, 1200], n_ions=n,
                         jump_distance_A=a, target_relative_error=0.25)
    assert plan.reachable
    errors, dropped, n_runs = [], 0, 0
    for s in range(64):
        T, D, se = [], [], []
        for i, run in enumerate(plan.runs):
            dt = min(run.max_frame_interval_ps, run.length_ps / 199)  # ≥ 200 frames
            n_frames = int(math.ceil(run.length_ps / dt)) + 1
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", DiffkitWarning)
                camp = arrhenius_campaign(temperatures_K=(run.temperature_K,), Ea_eV=Ea,
                                          attempt_frequency_THz=nu, n_ions=n,
                                          n_frames=n_frames, frame_interval_ps=dt,
                                          jump_distance_A=a,
                                          seed=np.random.SeedSequence([s, i, 77]))
                est = estimate_diffusion(compute_msd(camp.runs[0].trajectory, "Li",
                                                     reference="none"))
            n_runs += 1
            if not est.has_value or est.is_upper_bound:
                dropped += 1          # a user would leave this temperature out
                continue
            T.append(run.temperature_K)
            D.append(est.D_cm2_per_s)
            se.append(est.D_stderr_cm2_per_s)
        assert camp.D300_cm2_per_s == pytest.approx(D0 * math.exp(-Ea / (K_B_EV * 300)),
                                                     rel=1e-9)
        fit = fit_arrhenius(T, D, se)
        errors.append(math.log(fit.extrapolate(300.0).value / camp.D300_cm2_per_s))
    assert dropped <= 0.03 * n_runs
    rms = math.sqrt(np.mean(np.square(errors)))
    ratio = rms / plan.planned_relative_error
    print(f'planned {plan.planned_relative_error:.4f} achieved RMS {rms:.4f} ratio {ratio:.3f} dropped {dropped}/{n_runs}')
    assert 1 / 1.5 < ratio < 1.5, (rms, plan.planned_relative_error)
