"""Tests of diffkit.arrhenius: recovery, calibrated intervals, flags and bad input.

External references used here:
- the Arrhenius law ln D = ln D0 − Ea/(k_B T) with k_B from scipy.constants (CODATA);
- weighted least squares as computed by scipy.optimize.curve_fit (a general-purpose
  library), with absolute_sigma=True (errors known) and False (errors rescaled by the
  residual scatter);
- coverage of 95% intervals checked against synthetic data with Gaussian noise of known
  size (the binomial spread at 500 draws is about ±1 point).
"""

import json
import math
import warnings

import numpy as np
import pytest
from scipy import constants, optimize, stats

from diffkit.arrhenius import (STATISTICS_NORMAL, STATISTICS_STUDENT_T, ArrheniusFit,
                               fit_arrhenius)
from diffkit.errors import DiffkitWarning, FitError, InputError

K_B = constants.k / constants.e  # eV/K, CODATA via scipy (independent of diffkit.units)

TEMPS = np.array([600.0, 700.0, 800.0, 900.0, 1000.0, 1200.0])
LN_ERR = np.array([0.15, 0.12, 0.10, 0.08, 0.07, 0.06])  # stated error of ln D per point
EA_TRUE, D0_TRUE = 0.25, 1e-3


def arrhenius_D(T, Ea=EA_TRUE, D0=D0_TRUE):
    """The Arrhenius law (textbook form), D in cm²/s."""
    return D0 * np.exp(-Ea / (K_B * np.asarray(T, dtype=float)))


def noisy_campaign(seed, scatter_factor=1.0):
    """ln D with Gaussian noise of sd scatter_factor × LN_ERR; stated error LN_ERR."""
    rng = np.random.default_rng(seed)
    lnD = np.log(arrhenius_D(TEMPS)) + rng.normal(0.0, LN_ERR * scatter_factor)
    D = np.exp(lnD)
    return D, LN_ERR * D


# ----------------------------------------------------------------------------- recovery


def test_exact_recovery_on_noise_free_data():
    # Arrhenius law evaluated exactly: the fit must return Ea and D0 to 1e-10 relative
    for Ea, D0 in [(0.25, 1e-3), (0.6, 3e-2), (0.12, 2e-5)]:
        D = arrhenius_D(TEMPS, Ea, D0)
        fit = fit_arrhenius(TEMPS, D, 0.1 * D)
        assert fit.Ea_eV == pytest.approx(Ea, rel=1e-10)
        assert fit.D0_cm2_per_s == pytest.approx(D0, rel=1e-10)
        assert fit.statistics == STATISTICS_NORMAL
        assert fit.chi2_reduced < 1e-12
        # every leave-one-out refit of exact data also recovers Ea
        np.testing.assert_allclose(fit.Ea_leave_one_out_eV, Ea, rtol=1e-9)
        assert fit.Ea_leave_one_out_spread_eV < 1e-9
        assert not fit.curvature_flag
        assert fit.extrapolate(300.0).D_cm2_per_s == pytest.approx(arrhenius_D(300.0, Ea, D0),
                                                                    rel=1e-9)


def test_sigma_T_quantity_uses_the_same_fit():
    # ln(σT) = ln A − Ea/(k_B T): same law, other unit names
    A, Ea = 5e3, 0.3
    sT = A * np.exp(-Ea / (K_B * TEMPS))
    fit = fit_arrhenius(TEMPS, sT, 0.05 * sT, quantity="sigma_T")
    assert fit.Ea_eV == pytest.approx(Ea, rel=1e-10)
    assert fit.prefactor == pytest.approx(A, rel=1e-10)
    d = fit.to_dict()
    assert d["sigmaT0_S_K_per_cm"] == pytest.approx(A, rel=1e-10)
    assert "D0_cm2_per_s" not in d
    with pytest.raises(Exception, match="prefactor is sigmaT0_S_K_per_cm"):
        fit.D0_cm2_per_s


def test_matches_scipy_curve_fit_with_known_and_rescaled_errors():
    # Reference: scipy.optimize.curve_fit on ln D = a − Ea x, x = 1/(k_B T)
    x = 1.0 / (K_B * TEMPS)

    def line(xx, a, ea):
        return a - ea * xx

    for seed in range(6):
        D, err = noisy_campaign(seed, scatter_factor=2.0)
        fit = fit_arrhenius(TEMPS, D, err)
        absolute = fit.statistics == STATISTICS_NORMAL
        popt, pcov = optimize.curve_fit(line, x, np.log(D), p0=[-7.0, 0.2], sigma=err / D,
                                        absolute_sigma=absolute)
        assert fit.Ea_eV == pytest.approx(popt[1], rel=1e-7)
        assert fit.ln_prefactor == pytest.approx(popt[0], rel=1e-7)
        np.testing.assert_allclose(fit.covariance, pcov, rtol=1e-6)
        # interval = estimate ± quantile × stderr with the stated distribution
        q = (stats.t.ppf(0.975, len(TEMPS) - 2) if fit.statistics == STATISTICS_STUDENT_T
             else stats.norm.ppf(0.975))
        lo, hi = fit.Ea_interval95_eV
        assert lo == pytest.approx(fit.Ea_eV - q * math.sqrt(pcov[1, 1]), rel=1e-6)
        assert hi == pytest.approx(fit.Ea_eV + q * math.sqrt(pcov[1, 1]), rel=1e-6)


def test_leave_one_out_matches_refits():
    D, err = noisy_campaign(11)
    fit = fit_arrhenius(TEMPS, D, err)
    assert len(fit.Ea_leave_one_out_eV) == len(TEMPS)
    for k in range(len(TEMPS)):
        keep = np.arange(len(TEMPS)) != k
        ref = fit_arrhenius(TEMPS[keep], D[keep], err[keep]).Ea_eV
        assert fit.Ea_leave_one_out_eV[k] == pytest.approx(ref, rel=1e-10)
    assert fit.Ea_leave_one_out_spread_eV == pytest.approx(
        np.ptp(fit.Ea_leave_one_out_eV), rel=1e-12)


# ----------------------------------------------------------------------------- coverage


def _coverage(n_seeds, scatter_factor, seed_offset):
    hit_ea = hit_d = student = 0
    D300 = arrhenius_D(300.0)
    for seed in range(seed_offset, seed_offset + n_seeds):
        D, err = noisy_campaign(seed, scatter_factor)
        fit = fit_arrhenius(TEMPS, D, err)
        lo, hi = fit.Ea_interval95_eV
        hit_ea += lo <= EA_TRUE <= hi
        plo, phi = fit.extrapolate(300.0).D_interval95_cm2_per_s
        hit_d += plo <= D300 <= phi
        student += fit.statistics == STATISTICS_STUDENT_T
    return hit_ea / n_seeds, hit_d / n_seeds, student / n_seeds


def test_coverage_with_correctly_stated_errors():
    # Synthetic Gaussian noise of exactly the stated size, 500 seeds
    ea_cov, d_cov, student = _coverage(500, 1.0, seed_offset=0)
    print(f"coverage, stated errors correct: Ea {ea_cov:.3f}, D(300 K) {d_cov:.3f}, "
          f"student-t chosen in {student:.3f}")
    assert 0.90 <= ea_cov <= 0.99
    assert 0.90 <= d_cov <= 0.99
    # χ²_red > 1 happens by chance in a sizeable fraction of campaigns (P(χ²_4 > 4) = 0.41)
    assert 0.3 < student < 0.5


def test_coverage_with_scatter_larger_than_stated_errors():
    # True scatter 3× the stated errors: the fit must notice (Student t) and stay calibrated
    ea_cov, d_cov, student = _coverage(500, 3.0, seed_offset=10_000)
    print(f"coverage, scatter 3x stated errors: Ea {ea_cov:.3f}, D(300 K) {d_cov:.3f}, "
          f"student-t chosen in {student:.3f}")
    assert student > 0.9
    assert 0.90 <= ea_cov <= 0.99
    assert 0.90 <= d_cov <= 0.99


def test_extra_scatter_is_reported_in_words():
    D, err = noisy_campaign(3, scatter_factor=6.0)
    fit = fit_arrhenius(TEMPS, D, err)
    assert fit.statistics == STATISTICS_STUDENT_T
    assert fit.scale_factor == pytest.approx(math.sqrt(fit.chi2_reduced))
    assert fit.quantile95 == pytest.approx(stats.t.ppf(0.975, len(TEMPS) - 2))
    assert any("exceeds the error bars" in m for m in fit.messages)


# ----------------------------------------------------------------------------- curvature


def test_curvature_flag_on_two_mechanisms():
    # Two Arrhenius branches in parallel (a low-Ea and a high-Ea path): ln D bends in 1/T
    T = np.array([500.0, 600.0, 700.0, 850.0, 1000.0, 1200.0, 1500.0])
    D = 1e-4 * np.exp(-0.15 / (K_B * T)) + 1e0 * np.exp(-0.9 / (K_B * T))
    rng = np.random.default_rng(5)
    D = D * np.exp(rng.normal(0.0, 0.05, len(T)))
    fit = fit_arrhenius(T, D, 0.05 * D)
    assert fit.curvature_flag
    assert "curvature" in fit.flags
    assert any("mechanism may change" in m for m in fit.messages)


def test_curvature_false_positive_rate_on_straight_data():
    # Straight Arrhenius data with Gaussian noise: a 95% test flags at most ~5% of seeds
    n = 400
    flagged = sum(fit_arrhenius(TEMPS, *noisy_campaign(seed)).curvature_flag
                  for seed in range(20_000, 20_000 + n))
    rate = flagged / n
    print(f"curvature false-positive rate on straight data: {rate:.3f}")
    assert rate <= 0.07


# ----------------------------------------------------------------------------- bounds


def test_upper_bound_conflict_and_consistency():
    D = arrhenius_D(TEMPS)
    D_500 = arrhenius_D(500.0)
    fit = fit_arrhenius(TEMPS, D, 0.1 * D, upper_bounds=[(500.0, D_500 / 100.0)])
    assert fit.upper_bound_conflict
    assert fit.upper_bounds[0].conflict
    assert "upper bound conflict" in fit.flags
    assert any("no hops were seen" in m for m in fit.messages)
    # the bound is kept out of the least squares: same Ea as without it
    assert fit.Ea_eV == pytest.approx(EA_TRUE, rel=1e-10)

    ok = fit_arrhenius(TEMPS, D, 0.1 * D, upper_bounds=[(500.0, D_500 * 10.0)])
    assert not ok.upper_bound_conflict
    assert not ok.upper_bounds[0].conflict
    assert ok.upper_bounds[0].upper_bound == pytest.approx(D_500 * 10.0)
    assert "upper bound conflict" not in ok.flags


# ----------------------------------------------------------------------------- extrapolation


def test_extrapolation_caution_and_intervals():
    D, err = noisy_campaign(7)
    fit = fit_arrhenius(TEMPS, D, err)
    far = fit.extrapolate(300.0)
    assert not far.inside_fitted_range
    for phrase in ("one mechanism", "no phase change", "screening estimate, not a measurement"):
        assert phrase in far.extrapolation_caution
    lo, hi = far.D_interval95_cm2_per_s
    plo, phi = far.D_prediction_interval95_cm2_per_s
    assert plo < lo < far.D_cm2_per_s < hi < phi
    inside = fit.extrapolate(850.0)
    assert inside.inside_fitted_range and inside.extrapolation_caution == ""
    # bands at 300 K are wider (in ln space) than inside the fitted range
    assert far.ln_stderr > inside.ln_stderr
    band = fit.band([300.0, 850.0])
    assert band.lower95[0] == pytest.approx(lo) and band.upper95[1] == pytest.approx(
        inside.interval95[1])


def test_two_temperatures_fit_with_known_errors():
    T = np.array([800.0, 1000.0])
    D = arrhenius_D(T)
    fit = fit_arrhenius(T, D, 0.1 * D)
    assert fit.Ea_eV == pytest.approx(EA_TRUE, rel=1e-10)
    assert fit.statistics == STATISTICS_NORMAL
    assert math.isnan(fit.chi2_reduced)
    assert "two temperatures only" in fit.flags
    # error propagation for two points (analytic): var(Ea) = (e1² + e2²)/(x1 − x2)²
    x = 1.0 / (K_B * T)
    assert fit.Ea_stderr_eV == pytest.approx(math.sqrt(2 * 0.1 ** 2) / abs(x[0] - x[1]), rel=1e-9)
    json.dumps(fit.to_dict())


def test_result_is_frozen_and_serialisable():
    D, err = noisy_campaign(1)
    fit = fit_arrhenius(TEMPS, D, err, upper_bounds=[(450.0, 1e-5)])
    assert isinstance(fit, ArrheniusFit)
    with pytest.raises(Exception):
        fit.Ea_eV = 1.0
    d = json.loads(json.dumps(fit.to_dict()))
    assert d["covariance_order"] == ["ln_prefactor", "Ea_eV"]
    assert d["D0_cm2_per_s"] == pytest.approx(fit.D0_cm2_per_s)
    assert len(d["upper_bounds"]) == 1
    assert "Ea =" in repr(fit) and "eV" in repr(fit)
    json.dumps(fit.extrapolate(300.0).to_dict())


# ----------------------------------------------------------------------------- bad input


def test_fewer_than_two_temperatures():
    with pytest.raises(FitError, match="two or more distinct temperatures; got one \\(900 K\\)"):
        fit_arrhenius([900.0], [1e-6], [1e-7])
    # duplicates of one temperature are still one temperature
    with pytest.warns(DiffkitWarning):
        with pytest.raises(FitError, match="single temperature can still be reported"):
            fit_arrhenius([900.0, 900.0], [1e-6, 1.1e-6], [1e-7, 1e-7])


def test_duplicate_temperatures_are_combined():
    D = arrhenius_D(TEMPS)
    T2 = np.append(TEMPS, 800.0)
    D_extra = D[2] * 1.2
    D2 = np.append(D, D_extra)
    err2 = np.append(0.1 * D, 0.2 * D_extra)
    with pytest.warns(DiffkitWarning, match="duplicate temperatures were combined"):
        fit = fit_arrhenius(T2, D2, err2)
    assert fit.n_points == len(TEMPS)
    assert "duplicate temperatures combined" in fit.flags
    # inverse-variance weighted mean of ln D (textbook weighted mean)
    w = np.array([1 / 0.1 ** 2, 1 / 0.2 ** 2])
    expected = np.sum(w * np.log([D[2], D_extra])) / np.sum(w)
    i = int(np.nonzero(fit.temperatures_K == 800.0)[0][0])
    assert fit.ln_values[i] == pytest.approx(expected, rel=1e-12)
    assert fit.ln_stderr[i] == pytest.approx(1 / math.sqrt(w.sum()), rel=1e-12)


@pytest.mark.parametrize("T, D, err, match", [
    ([600.0, 900.0], [1e-7, -1e-6], [1e-8, 1e-7], r"D_cm2_per_s: entry 1 \(T = 900 K\)"),
    ([600.0, 900.0], [1e-7, 0.0], [1e-8, 1e-7], r"expected a positive finite value"),
    ([600.0, 900.0], [1e-7, 1e-6], [1e-8, 0.0], r"D_stderr_cm2_per_s: entry 1"),
    ([600.0, 900.0], [1e-7, 1e-6], [-1e-8, 1e-7], r"positive finite error"),
    ([600.0, 0.0], [1e-7, 1e-6], [1e-8, 1e-7], r"temperatures_K: entry 1.*> 0 K"),
    ([-600.0, 900.0], [1e-7, 1e-6], [1e-8, 1e-7], r"temperatures_K: entry 0"),
    ([600.0, 900.0], [1e-7, float("nan")], [1e-8, 1e-7], r"D_cm2_per_s: entry 1"),
    ([600.0, 900.0, 1000.0], [1e-7, 1e-6], [1e-8, 1e-7], r"same length"),
])
def test_bad_input_messages(T, D, err, match):
    with pytest.raises(InputError, match=match):
        fit_arrhenius(T, D, err)


def test_bad_upper_bounds():
    D = arrhenius_D(TEMPS)
    with pytest.raises(InputError, match="upper_bounds: entry 0 .*bound"):
        fit_arrhenius(TEMPS, D, 0.1 * D, upper_bounds=[(500.0, 0.0)])
    with pytest.raises(InputError, match="upper_bounds: entry 1 .*temperature"):
        fit_arrhenius(TEMPS, D, 0.1 * D, upper_bounds=[(500.0, 1e-8), (-3.0, 1e-8)])
    with pytest.raises(InputError, match="expected a pair"):
        fit_arrhenius(TEMPS, D, 0.1 * D, upper_bounds=[(500.0, 1e-8, 3.0)])


def test_values_in_A2_per_ps_are_suspected():
    # 1 Å²/ps = 1e-4 cm²/s: values of order 0.1 given as "cm²/s" are almost surely Å²/ps
    D_a2ps = arrhenius_D(TEMPS) / (constants.angstrom ** 2 / constants.centi ** 2 / constants.pico)
    with pytest.warns(DiffkitWarning, match="looks like a value in Å²/ps"):
        fit_arrhenius(TEMPS, D_a2ps, 0.1 * D_a2ps)
    with warnings.catch_warnings():
        warnings.simplefilter("error", DiffkitWarning)
        D = arrhenius_D(TEMPS)
        fit_arrhenius(TEMPS, D, 0.1 * D)  # ordinary cm²/s values: no warning


def test_unknown_quantity_refused():
    from diffkit.errors import UsageError
    with pytest.raises(UsageError, match="quantity must be one of"):
        fit_arrhenius(TEMPS, arrhenius_D(TEMPS), arrhenius_D(TEMPS), quantity="sigma")
