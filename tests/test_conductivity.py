"""Tests of diffkit.conductivity: Nernst–Einstein numbers, bands, tiers, candidate summaries.

External references used here:
- Nernst–Einstein worked number (REFERENCES.md, Conductivity; CODATA 2018 constants):
  D = 1e-5 cm²/s, n = 1e22 cm⁻³, z = 1, T = 300 K gives σ = n z² e² D / (k_B T) = 0.61975 S/cm.
- Collective and charge-weighted forms σ = N q² D_σ/(V k_B T) and
  σ = lim ⟨|Σ q_i Δr_i|²⟩/(2 d V k_B T t) (REFERENCES.md, Conductivity).
- Monte Carlo sampling of the Arrhenius parameters from their covariance (numpy/scipy
  random generators) as the reference for the analytic σ(300 K) band.
- Tier defaults: REFERENCES.md, Conductivity (most Li solids < 1e-4 S/cm; ≥ 1 mS/cm target).
"""

import json
import math
import warnings

import numpy as np
import pytest
from scipy import constants

from diffkit.arrhenius import STATISTICS_NORMAL, STATISTICS_STUDENT_T, fit_arrhenius
from diffkit.conductivity import (CAUTIONS, UNRESOLVED_TIER, ConductivityTiers,
                                  collective_conductivity, default_charge,
                                  extrapolate_conductivity, fit_arrhenius_sigma_T,
                                  nernst_einstein, nernst_einstein_from_internal,
                                  sigma_from_charge_msd_slope, summarize_candidate, volume_at)
from diffkit.errors import DiffkitWarning, InputError, UsageError

K_B = constants.k / constants.e  # eV/K

# Worked number (REFERENCES.md, Conductivity; CODATA 2018): n = 1e22 cm⁻³ is 1e4 ions in
# 1e6 Å³ (1 Å³ = 1e-24 cm³); D = 1e-5 cm²/s is 0.1 Å²/ps (1 Å²/ps = 1e-4 cm²/s).
SIGMA_WORKED_S_PER_CM = 0.61975
N_IONS, VOLUME_A3, D_WORKED_CM2, D_WORKED_A2PS = 10_000, 1.0e6, 1e-5, 0.1


# ----------------------------------------------------------------------------- worked number


def test_worked_number_in_cm_units():
    res = nernst_einstein(D_WORKED_CM2, n_ions=N_IONS, volume_A3=VOLUME_A3, temperature_K=300.0)
    assert res.sigma_S_per_cm == pytest.approx(SIGMA_WORKED_S_PER_CM, rel=1e-4)
    assert res.sigma_mS_per_cm == pytest.approx(SIGMA_WORKED_S_PER_CM * 1e3, rel=1e-4)
    assert res.number_density_per_cm3 == pytest.approx(1e22, rel=1e-12)
    assert res.haven_ratio == 1.0 and res.charge == 1


def test_worked_number_from_internal_units():
    a = nernst_einstein_from_internal(D_WORKED_A2PS, N_IONS, VOLUME_A3, 300.0)
    b = nernst_einstein(D_A2_per_ps=D_WORKED_A2PS, n_ions=N_IONS, volume_A3=VOLUME_A3,
                        temperature_K=300.0)
    for res in (a, b):
        assert res.sigma_S_per_cm == pytest.approx(SIGMA_WORKED_S_PER_CM, rel=1e-4)
        assert res.D_cm2_per_s == pytest.approx(D_WORKED_CM2, rel=1e-12)


def test_worked_number_by_collective_and_charge_weighted_routes():
    coll = collective_conductivity(D_WORKED_CM2, n_ions=N_IONS, volume_A3=VOLUME_A3,
                                   temperature_K=300.0)
    assert coll.sigma_S_per_cm == pytest.approx(SIGMA_WORKED_S_PER_CM, rel=1e-4)
    assert coll.haven_ratio is None
    # uncorrelated ions: ⟨|Σ q Δr|²⟩ = N q² 2 d D t, so the slope is 2 d N q² D (e²·Å²/ps)
    slope = 2 * 3 * N_IONS * 1 ** 2 * D_WORKED_A2PS
    cw = sigma_from_charge_msd_slope(slope, volume_A3=VOLUME_A3, temperature_K=300.0,
                                     slope_stderr_e2_A2_per_ps=0.1 * slope)
    assert cw.sigma_S_per_cm == pytest.approx(SIGMA_WORKED_S_PER_CM, rel=1e-4)
    assert cw.sigma_stderr_S_per_cm == pytest.approx(0.1 * SIGMA_WORKED_S_PER_CM, rel=1e-4)


def test_haven_ratio_charge_and_stderr_scale_as_the_formula_says():
    # σ = N z² e² D / (V k_B T H_R): ∝ z², ∝ 1/H_R, ∝ D
    base = dict(n_ions=N_IONS, volume_A3=VOLUME_A3, temperature_K=300.0)
    half = nernst_einstein(D_WORKED_CM2, haven_ratio=0.5, **base)
    assert half.sigma_S_per_cm == pytest.approx(2 * SIGMA_WORKED_S_PER_CM, rel=1e-4)
    assert half.haven_ratio == 0.5
    z2 = nernst_einstein(D_WORKED_CM2, charge=2, D_stderr_cm2_per_s=2e-6, **base)
    assert z2.sigma_S_per_cm == pytest.approx(4 * SIGMA_WORKED_S_PER_CM, rel=1e-4)
    assert z2.sigma_stderr_S_per_cm == pytest.approx(0.8 * SIGMA_WORKED_S_PER_CM, rel=1e-4)
    assert "0.6" in repr(nernst_einstein(D_WORKED_CM2, **base))
    json.dumps(z2.to_dict())


def test_default_charges():
    # alkali +1, alkaline-earth and Zn +2 (common practice: their usual ionic charges)
    assert [default_charge(s) for s in ("Li", "Na", "K", "Rb", "Cs", "li")] == [1] * 6
    assert [default_charge(s) for s in ("Mg", "Ca", "Sr", "Ba", "Zn")] == [2] * 5
    for s in ("O", "F", "Al", "Ag"):
        with pytest.raises(InputError, match="give the charge explicitly"):
            default_charge(s)


@pytest.mark.parametrize("kwargs, match", [
    (dict(D_cm2_per_s=-1e-6), r"D_cm2_per_s: expected a finite value ≥ 0"),
    (dict(volume_A3=0.0), r"volume_A3: expected a finite value > 0"),
    (dict(temperature_K=-5.0), r"temperature_K: expected a finite value > 0"),
    (dict(n_ions=0), r"n_ions"),
    (dict(charge=0), r"charge: expected a non-zero"),
    (dict(haven_ratio=0.0), r"haven_ratio"),
])
def test_nernst_einstein_bad_input(kwargs, match):
    args = dict(D_cm2_per_s=1e-6, n_ions=10, volume_A3=1000.0, temperature_K=300.0)
    args.update(kwargs)
    with pytest.raises(InputError, match=match):
        nernst_einstein(**args)


def test_nernst_einstein_misuse_and_unit_warning():
    with pytest.raises(UsageError, match="exactly one of"):
        nernst_einstein(1e-6, D_A2_per_ps=0.01, n_ions=10, volume_A3=1000.0, temperature_K=300.0)
    with pytest.warns(DiffkitWarning, match="Å²/ps"):
        nernst_einstein(0.1, n_ions=10, volume_A3=1000.0, temperature_K=300.0)


# ----------------------------------------------------------------------------- σ(300 K) band


def _noisy_fit(seed, scatter=1.0):
    T = np.array([600.0, 700.0, 800.0, 1000.0, 1200.0])
    rng = np.random.default_rng(seed)
    ln_err = np.full(len(T), 0.1)
    D = 2e-3 * np.exp(-0.28 / (K_B * T) + rng.normal(0.0, scatter * ln_err))
    return fit_arrhenius(T, D, ln_err * D)


@pytest.mark.parametrize("seed, scatter", [(1, 1.0), (2, 4.0)])
def test_sigma_300K_band_analytic_vs_monte_carlo(seed, scatter):
    fit = _noisy_fit(seed, scatter)
    ext = extrapolate_conductivity(fit, temperature_K=300.0, n_ions=48, volume_A3=2500.0,
                                   charge=1, haven_ratio=1.0)
    # Reference: draw (ln D0, Ea) from the fit's covariance (multivariate normal, or
    # multivariate t with n − 2 degrees of freedom when the fit chose Student t), push each
    # draw through the Arrhenius law and Nernst–Einstein, take the 2.5/97.5 percentiles.
    rng = np.random.default_rng(1234)
    n = 400_000
    draws = rng.multivariate_normal([fit.ln_prefactor, fit.Ea_eV], fit.covariance, size=n)
    if fit.statistics == STATISTICS_STUDENT_T:
        draws = (np.array([fit.ln_prefactor, fit.Ea_eV])
                 + (draws - [fit.ln_prefactor, fit.Ea_eV])
                 / np.sqrt(rng.chisquare(fit.dof, size=n) / fit.dof)[:, None])
    D300 = np.exp(draws[:, 0] - draws[:, 1] / (K_B * 300.0))
    sigma = np.array([nernst_einstein(d, n_ions=48, volume_A3=2500.0, temperature_K=300.0)
                      .sigma_S_per_cm for d in D300[:3]])  # same formula, spot check
    factor = sigma[0] / D300[0]
    lo, hi = np.percentile(factor * D300, [2.5, 97.5])
    a_lo, a_hi = ext.sigma_interval95_S_per_cm
    assert a_lo == pytest.approx(lo, rel=0.05)
    assert a_hi == pytest.approx(hi, rel=0.05)
    assert ext.statistics == fit.statistics
    assert ext.sigma_mS_per_cm == pytest.approx(ext.sigma_S_per_cm * 1e3)
    assert "one mechanism" in ext.extrapolation_caution


def test_sigma_T_route_agrees_with_tracer_route_on_exact_data():
    # With one volume at all temperatures, σT ∝ D so both routes give the same Ea and σ(300 K)
    T = np.array([600.0, 800.0, 1000.0, 1200.0])
    D = 1e-3 * np.exp(-0.3 / (K_B * T))
    sig = np.array([nernst_einstein(d, n_ions=20, volume_A3=1500.0, temperature_K=t)
                    .sigma_S_per_cm for d, t in zip(D, T)])
    fit_s = fit_arrhenius_sigma_T(T, sig, 0.1 * sig)
    assert fit_s.Ea_eV == pytest.approx(0.3, rel=1e-10)
    from_s = extrapolate_conductivity(fit_s, temperature_K=300.0)
    D300 = 1e-3 * np.exp(-0.3 / (K_B * 300.0))
    ref = nernst_einstein(D300, n_ions=20, volume_A3=1500.0, temperature_K=300.0)
    assert from_s.sigma_S_per_cm == pytest.approx(ref.sigma_S_per_cm, rel=1e-9)
    assert "sigma*T" in from_s.route


# ----------------------------------------------------------------------------- tiers


def test_default_tiers_and_unresolved():
    tiers = ConductivityTiers()
    assert tiers.boundaries_S_per_cm == (1e-4, 1e-3)
    assert tiers.classify(2e-3, 8e-3) == "fast"
    assert tiers.classify(2e-4, 8e-4) == "moderate"
    assert tiers.classify(1e-6, 5e-5) == "slow"
    assert tiers.classify(5e-4, 2e-3) == UNRESOLVED_TIER      # straddles 1e-3
    assert tiers.classify(5e-5, 2e-3) == UNRESOLVED_TIER      # spans three tiers
    assert tiers.tier_of(1e-3) == "fast"                      # boundary belongs to the higher tier
    assert tiers.classify(0.0, 5e-5, is_upper_bound=True) == "slow"
    assert tiers.classify(0.0, 5e-4, is_upper_bound=True) == UNRESOLVED_TIER


def test_user_tiers_are_respected():
    tiers = ConductivityTiers(boundaries_S_per_cm=(1e-5, 1e-2), names=("poor", "usable", "excellent"))
    assert tiers.classify(2e-3, 8e-3) == "usable"
    assert tiers.classify(2e-2, 3e-2) == "excellent"
    assert tiers.classify(5e-6, 2e-5) == UNRESOLVED_TIER
    with pytest.raises(UsageError, match="increase"):
        ConductivityTiers(boundaries_S_per_cm=(1e-3, 1e-4))
    with pytest.raises(UsageError, match="need 3 names"):
        ConductivityTiers(names=("a", "b"))


# ----------------------------------------------------------------------------- volume


def test_volume_at_lowest_and_linear():
    T = [600.0, 800.0, 1000.0]
    V = [1000.0 + 0.02 * t for t in T]  # exactly linear ⟨V⟩(T)
    low = volume_at(300.0, T, V, method="lowest")
    assert low.volume_A3 == pytest.approx(1012.0) and low.method == "lowest"
    assert "lowest simulated temperature, 600 K" in low.description
    lin = volume_at(300.0, T, V, method="linear")
    assert lin.volume_A3 == pytest.approx(1006.0, rel=1e-12) and lin.method == "linear"
    assert "linear extrapolation" in lin.description
    with pytest.raises(InputError, match="two or more distinct temperatures"):
        volume_at(300.0, [600.0], [1000.0], method="linear")
    with pytest.raises(UsageError, match="'lowest' or 'linear'"):
        volume_at(300.0, T, V, method="mean")
    with pytest.raises(InputError, match="volumes_A3: entry 1"):
        volume_at(300.0, T, [1000.0, -1.0, 1000.0])


# ----------------------------------------------------------------------------- candidate


def _candidate_data(Ea=0.25, D0=2e-3):
    T = np.array([600.0, 800.0, 1000.0, 1200.0])
    D = D0 * np.exp(-Ea / (K_B * T))
    return T, D, 0.1 * D, [1000.0, 1004.0, 1008.0, 1012.0]


def test_summarize_candidate_exact_data():
    T, D, err, V = _candidate_data()
    summ = summarize_candidate("candA", T, D, err, n_ions=32, volumes_A3=V, species="Li",
                               haven_ratio=0.8)
    D300 = 2e-3 * math.exp(-0.25 / (K_B * 300.0))
    # Nernst–Einstein at 300 K with the lowest temperature's volume (1000 Å³), H_R = 0.8
    ref = nernst_einstein(D300, n_ions=32, volume_A3=1000.0, temperature_K=300.0, haven_ratio=0.8)
    assert summ.Ea_eV == pytest.approx(0.25, rel=1e-10)
    assert summ.sigma_target_S_per_cm == pytest.approx(ref.sigma_S_per_cm, rel=1e-9)
    assert summ.sigma_target_mS_per_cm == pytest.approx(ref.sigma_mS_per_cm, rel=1e-9)
    lo, hi = summ.sigma_target_interval95_S_per_cm
    assert lo < summ.sigma_target_S_per_cm < hi
    assert summ.tier == ConductivityTiers().classify(lo, hi)
    assert summ.haven_ratio == 0.8 and summ.charge == 1 and summ.route == "tracer_D"
    assert "Haven ratio 0.8" in summ.route_description
    assert "lowest simulated temperature" in summ.volume_note
    assert summ.cautions == CAUTIONS
    assert any("screening estimates" in c for c in summ.cautions)
    assert any("safety rules and licensed practice" in c for c in summ.cautions)
    assert any("no phase change" in m for m in summ.messages)
    assert len(summ.sigma_at_temperatures) == 4
    assert summ.sigma_at_temperatures[0].volume_A3 == 1000.0
    d = json.loads(json.dumps(summ.to_dict()))
    assert d["fit"]["Ea_eV"] == pytest.approx(0.25)
    assert "candA" in repr(summ)


def test_summarize_candidate_tiers_and_routes():
    T, D, err, V = _candidate_data(Ea=0.2, D0=1e-4)   # fast: σ(300 K) ≈ 17 mS/cm here
    fast = summarize_candidate("fast one", T, D, 0.02 * D, n_ions=64, volumes_A3=1000.0,
                               charge=1)
    assert fast.tier == "fast"
    assert fast.volume_note.startswith("cell volume given by the caller")
    slow = summarize_candidate("slow one", *_candidate_data(Ea=0.7)[:3], n_ions=64,
                               volumes_A3=1000.0, charge=1)
    assert slow.tier == "slow"
    strict = ConductivityTiers(boundaries_S_per_cm=(1e-1, 1.0), names=("low", "mid", "high"))
    assert summarize_candidate("fast one", T, D, 0.02 * D, n_ions=64, volumes_A3=1000.0,
                               charge=1, tiers=strict).tier == "low"
    by_sT = summarize_candidate("fast one", T, D, 0.02 * D, n_ions=64, volumes_A3=1000.0,
                                charge=1, route="sigma_T")
    assert by_sT.route == "sigma_T" and by_sT.fit.quantity == "sigma_T"
    assert by_sT.sigma_target_S_per_cm == pytest.approx(fast.sigma_target_S_per_cm, rel=1e-9)
    with_coll = summarize_candidate("c", T, D, 0.1 * D, n_ions=64, volumes_A3=V, charge=1,
                                    D_sigma_cm2_per_s=2 * D, D_sigma_stderr_cm2_per_s=0.5 * D)
    assert with_coll.sigma_collective_at_temperatures[1].sigma_S_per_cm == pytest.approx(
        2 * with_coll.sigma_at_temperatures[1].sigma_S_per_cm, rel=1e-12)


def test_summarize_candidate_unresolved_band():
    # few, noisy points: the σ(300 K) band spans a tier boundary
    T = np.array([700.0, 1000.0, 1300.0])
    D = 3e-3 * np.exp(-0.25 / (K_B * T))
    summ = summarize_candidate("wide", T, D, 0.6 * D, n_ions=32, volumes_A3=900.0, charge=1)
    lo, hi = summ.sigma_target_interval95_S_per_cm
    tiers = ConductivityTiers()
    assert tiers.tier_of(lo) != tiers.tier_of(hi)
    assert summ.tier == UNRESOLVED_TIER and "tier unresolved" in summ.flags


def test_summarize_candidate_upper_bound_conflict_is_carried():
    T, D, err, V = _candidate_data()
    D500 = 2e-3 * math.exp(-0.25 / (K_B * 500.0))
    summ = summarize_candidate("c", T, D, err, n_ions=32, volumes_A3=V, species="Na",
                               upper_bounds=[(500.0, D500 / 50)])
    assert "upper bound conflict" in summ.flags


def test_summarize_candidate_single_temperature_and_upper_bound():
    # one temperature with hops, a lower one without: no fit, σ at 900 K and a bound at 300 K
    summ = summarize_candidate("sluggish", [900.0], [1e-8], [1e-9], n_ions=32, volumes_A3=1000.0,
                               species="Li", upper_bounds=[(600.0, 1e-11)])
    assert summ.fit is None and summ.Ea_eV is None
    assert "no Arrhenius fit" in summ.flags
    assert any("two or more distinct temperatures" in m for m in summ.messages)
    assert summ.sigma_at_temperatures[0].temperature_K == 900.0
    assert summ.sigma_target_is_upper_bound
    bound = nernst_einstein(1e-11, n_ions=32, volume_A3=1000.0, temperature_K=300.0)
    assert summ.sigma_target_S_per_cm == pytest.approx(bound.sigma_S_per_cm, rel=1e-12)
    assert summ.tier == "slow"     # bound below the lowest boundary → lowest tier
    json.dumps(summ.to_dict())


def test_summarize_candidate_bad_input():
    T, D, err, V = _candidate_data()
    with pytest.raises(InputError, match="give charge= or species="):
        summarize_candidate("c", T, D, err, n_ions=32, volumes_A3=V)
    with pytest.raises(InputError, match="no default charge for mobile species 'Cl'"):
        summarize_candidate("c", T, D, err, n_ions=32, volumes_A3=V, species="Cl")
    with pytest.raises(InputError, match="one volume per temperature"):
        summarize_candidate("c", T, D, err, n_ions=32, volumes_A3=V[:2], charge=1)
    with pytest.raises(InputError, match=r"D_cm2_per_s: entry 2 \(T = 1000 K\)"):
        summarize_candidate("c", T, np.where(T == 1000.0, -1.0, D), err, n_ions=32,
                            volumes_A3=V, charge=1)
    with pytest.raises(UsageError, match="route must be"):
        summarize_candidate("c", T, D, err, n_ions=32, volumes_A3=V, charge=1, route="both")
    with warnings.catch_warnings():
        warnings.simplefilter("error", DiffkitWarning)
        summarize_candidate("c", T, D, err, n_ions=32, volumes_A3=V, charge=1)  # no warning


def test_extrapolate_conductivity_misuse():
    fit = _noisy_fit(3)
    with pytest.raises(UsageError, match="needs n_ions and volume_A3"):
        extrapolate_conductivity(fit, temperature_K=300.0)
    with pytest.raises(UsageError, match="expected an ArrheniusFit"):
        extrapolate_conductivity({"Ea_eV": 0.3})
    assert fit.statistics in (STATISTICS_NORMAL, STATISTICS_STUDENT_T)
