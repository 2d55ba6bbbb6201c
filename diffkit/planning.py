"""Plan a temperature campaign: how long to simulate for a target precision at 300 K.

Before any run, from a guess of the activation energy Ea and of D at one
temperature (or of the prefactor D0), the number of mobile ions, the jump
distance and a list of candidate temperatures, estimate how long each run must
be for the Arrhenius extrapolation to reach a target relative error on D (and
so on σ) at the target temperature, and choose the set of temperatures that
gets there with the least total simulated time (or cost).

Model (docs/methods_arrhenius_planning.md):

* expected diffusivity D(T) = D0 exp(−Ea / k_B T);
* effective number of hops of a run of length t with n mobile ions in d
  dimensions and jump distance a: N_eff = n · 2d · D(T) · t / a² — the expected
  total squared displacement of all ions over a² (He, Zhu, Epstein & Mo, npj
  Comput. Mater. 4, 18 (2018));
* relative standard error of D from one run: RSD = A / √N_eff + B
  (:class:`PrecisionModel`; the same form as He et al., with constants calibrated
  on this project's synthetic runs and its own estimator unless given);
* the runs' errors carried through the weighted least-squares line of ln D
  against x = 1/(k_B T) with the errors taken as known:
  var(ln D(T0)) = 1/S + (x0 − x̄)² / Sxx, with weights w = 1/RSD², S = Σw,
  x̄ = Σwx / S, Sxx = Σ w (x − x̄)².

The relative error of σ(T0) from the tracer route equals that of D(T0) (the
volume, charge and Haven ratio enter as fixed factors).

For every subset of the candidate temperatures (at least ``min_temperatures``)
the run lengths are chosen to minimise Σ cost_i · t_i subject to
var(ln D(T0)) ≤ target², each run at least long enough for ``min_effective_hops``
and ``min_hops_per_ion`` and at most ``max_length_ps``; the cheapest subset wins.
"""

from __future__ import annotations

import itertools
import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import optimize as _opt
from scipy import stats as _stats

from .arrhenius import _SUSPICIOUS_D_CM2_PER_S
from ._checks import positive_number
from .errors import DiffkitWarning, InputError, UsageError
from .results import to_plain
from .units import A2_PER_PS_IN_CM2_PER_S, K_B_EV_PER_K, MS_PER_S, cm2s_to_a2ps

__all__ = [
    "PrecisionModel",
    "SYNTHETIC_PRECISION",
    "HE_2018_PRECISION",
    "default_precision_model",
    "ExtrapolationPrecision",
    "extrapolation_precision",
    "PlannedRun",
    "CandidateTemperature",
    "TemperatureSetOption",
    "CampaignPlan",
    "plan_campaign",
]

_Z95 = float(_stats.norm.ppf(0.975))
#: More candidate temperatures than this make the subset search too long.
_MAX_CANDIDATES = 12
#: Runs longer than this (1 ms) are not considered, whatever ``max_length_ps`` says.
_LONGEST_PS = 1e9
#: An activation energy above this (eV) is probably in another unit.
_SUSPICIOUS_EA_EV = 3.0
#: Saved frames per mean residence time of one ion that a plan asks for (the precision
#: model was calibrated at 10–30; fewer frames per hop made D less precise).
_FRAMES_PER_RESIDENCE = 20.0


# --------------------------------------------------------------------------- precision model


@dataclass(frozen=True)
class PrecisionModel:
    """Expected relative standard error of D from one run: RSD = A / √N_eff + B.

    Attributes
    ----------
    hop_coefficient : float
        A (dimensionless).
    relative_error_floor : float
        B (dimensionless): the error no run length removes.
    source : str
        Where the constants come from.
    """

    hop_coefficient: float
    relative_error_floor: float
    source: str = ""

    def __post_init__(self):
        A, B = float(self.hop_coefficient), float(self.relative_error_floor)
        if not (math.isfinite(A) and A > 0):
            raise UsageError(f"PrecisionModel: hop_coefficient must be a positive number, got "
                             f"{self.hop_coefficient!r}")
        if not (math.isfinite(B) and B >= 0):
            raise UsageError(f"PrecisionModel: relative_error_floor must be ≥ 0, got "
                             f"{self.relative_error_floor!r}")
        object.__setattr__(self, "hop_coefficient", A)
        object.__setattr__(self, "relative_error_floor", B)

    def relative_error(self, effective_hops):
        """RSD of D for N_eff effective hops (scalar or array; inf where N_eff ≤ 0)."""
        n = np.asarray(effective_hops, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            out = np.where(n > 0, self.hop_coefficient / np.sqrt(np.maximum(n, 1e-300))
                           + self.relative_error_floor, np.inf)
        return float(out) if out.ndim == 0 else out

    def hops_needed(self, relative_error):
        """N_eff needed for a relative error (inf at or below the floor B)."""
        r = float(relative_error)
        if r <= self.relative_error_floor:
            return math.inf
        return (self.hop_coefficient / (r - self.relative_error_floor)) ** 2

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)

    def __str__(self):
        return (f"RSD(D) = {self.hop_coefficient:.3g}/sqrt(N_eff) + "
                f"{self.relative_error_floor:.3g}")


#: Calibrated on :func:`diffkit.synth.hopping_run` runs (non-interacting hoppers on a
#: simple cubic lattice, 5–50 ions, 5–80 hops per ion, 10–30 saved frames per mean
#: residence time, vibration 0.15 Å rms per axis) analysed with
#: :func:`diffkit.compute_msd` + :func:`diffkit.estimate_diffusion` (GLS, automatic
#: window): the RMS relative error of D over 80 seeds per setting, fitted as A/√N_eff + B.
#: The fitted floor was consistent with zero. See docs/methods_arrhenius_planning.md.
SYNTHETIC_PRECISION = PrecisionModel(
    1.06, 0.0,
    "calibrated on diffkit.synth hopping runs with diffkit's own MSD + GLS estimator "
    "(uncorrelated hops, >= 10 saved frames per mean residence time); floor fitted as 0")

#: The constants of He, Zhu, Epstein & Mo, npj Comput. Mater. 4, 18 (2018) for ab initio
#: MD (values from memory): a more conservative choice for real runs with correlated hops.
HE_2018_PRECISION = PrecisionModel(
    3.43, 0.04,
    "He, Zhu, Epstein & Mo, npj Comput. Mater. 4, 18 (2018), ab initio MD (constants from "
    "memory)")


def default_precision_model():
    """The precision model planning uses by default.

    The run verdict (:mod:`diffkit.trust`) owns the project's calibration of the
    effective-hop scaling (``RSD_A``, ``RSD_B``); planning uses the same constants so
    that a planned run and its verdict agree. :data:`SYNTHETIC_PRECISION` (an
    independent calibration made for planning) is the fallback.
    """
    try:
        from .trust import RSD_A, RSD_B
    except ImportError:  # pragma: no cover - trust.py is part of the package
        return SYNTHETIC_PRECISION
    return PrecisionModel(
        float(RSD_A), float(RSD_B),
        "diffkit.trust calibration on synthetic hopping runs with diffkit's own estimator "
        "(uncorrelated hops)")


def _trust_defaults():
    """(N_eff below which the verdict warns, hops per ion per frame above which it warns)."""
    try:
        from .trust import TrustThresholds
        th = TrustThresholds()
        return float(th.good_effective_hops), float(th.hops_per_frame_warn)
    except (ImportError, AttributeError, TypeError):  # pragma: no cover
        return 50.0, 0.1


# --------------------------------------------------------------------------- propagation


def _x_of(T):
    return 1.0 / (K_B_EV_PER_K * np.asarray(T, dtype=float))


def _line_variances(x, w, x0):
    """(var ln D at x0, var Ea, per-point gradient d var / d w) of a WLS line with weights w.

    var = 1/S + (x0 − x̄)²/Sxx; d var/d w_i = −(1/S + (x0 − x̄)(x_i − x̄)/Sxx)².
    """
    S = float(w.sum())
    xbar = float(w @ x) / S
    d = x - xbar
    Sxx = float(w @ (d * d))
    if Sxx <= 0:
        return math.inf, math.inf, np.zeros_like(x)
    var = 1.0 / S + (x0 - xbar) ** 2 / Sxx
    cross = 1.0 / S + (x0 - xbar) * d / Sxx   # g' F^-1 h_i
    return var, 1.0 / Sxx, -(cross * cross)


@dataclass(frozen=True)
class ExtrapolationPrecision:
    """Precision of an Arrhenius extrapolation from runs of known relative error.

    Attributes
    ----------
    target_temperature_K : float
    relative_error : float
        Standard error of ln D at the target (≈ relative error of D and σ there).
    Ea_stderr_eV : float
    ln_prefactor_stderr : float
        Standard error of ln D0.
    """

    target_temperature_K: float
    relative_error: float
    Ea_stderr_eV: float
    ln_prefactor_stderr: float

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)


def extrapolation_precision(temperatures_K, relative_errors, *, target_temperature_K=300.0):
    """Error of the Arrhenius line at a target temperature, errors taken as known.

    Parameters
    ----------
    temperatures_K : (n,) float, K
        Two or more distinct temperatures.
    relative_errors : (n,) float
        Relative standard error of D at each (the error of ln D).
    target_temperature_K : float, K

    Returns
    -------
    ExtrapolationPrecision
    """
    T = np.asarray(temperatures_K, dtype=float).reshape(-1)
    e = np.asarray(relative_errors, dtype=float).reshape(-1)
    if len(T) != len(e):
        raise InputError(f"temperatures_K and relative_errors must have the same length; got "
                         f"{len(T)} and {len(e)}")
    if np.any(~np.isfinite(T)) or np.any(T <= 0):
        raise InputError(f"temperatures_K must be finite and > 0 K, got {temperatures_K!r}")
    if np.any(~np.isfinite(e)) or np.any(e <= 0):
        raise InputError(f"relative_errors must be finite and > 0, got {relative_errors!r}")
    if len(np.unique(T)) < 2:
        raise InputError("a line needs two or more distinct temperatures")
    T0 = positive_number("target_temperature_K", target_temperature_K)
    x, w = _x_of(T), 1.0 / e ** 2
    var, var_ea, _ = _line_variances(x, w, float(_x_of(T0)))
    return ExtrapolationPrecision(T0, math.sqrt(var), math.sqrt(var_ea),
                                  math.sqrt(_line_variances(x, w, 0.0)[0]))


# --------------------------------------------------------------------------- results


@dataclass(frozen=True)
class PlannedRun:
    """One run of a plan.

    Attributes
    ----------
    temperature_K : float
    length_ps : float, ps
        Simulated time to run (after equilibration).
    effective_hops : float
        Expected N_eff = n · 2d · D · t / a².
    hops_per_ion : float
    D_cm2_per_s : float
        Expected D at this temperature.
    D_relative_error : float
        Expected relative standard error of D from this run.
    hop_rate_per_ion_per_ps : float, 1/ps
        Expected jumps per ion per ps, 2d·D/a².
    max_frame_interval_ps : float, ps
        Save positions at least this often: 20 frames per mean residence time of an ion
        (the precision model was calibrated at 10–30), or finer if the run verdict's
        ``hops_per_frame_warn`` asks for more.
    cost_per_ps : float
        Cost weight of one ps at this temperature.
    cost : float
        cost_per_ps × length_ps.
    at_minimum_length : bool
        True when the length is set by the minimum-hop rules, not by the precision.
    """

    temperature_K: float
    length_ps: float
    effective_hops: float
    hops_per_ion: float
    D_cm2_per_s: float
    D_relative_error: float
    hop_rate_per_ion_per_ps: float
    max_frame_interval_ps: float
    cost_per_ps: float
    cost: float
    at_minimum_length: bool

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)

    def __repr__(self):
        return (f"PlannedRun({self.temperature_K:g} K: {self.length_ps:.4g} ps, "
                f"N_eff {self.effective_hops:.4g}, RSD(D) {self.D_relative_error:.1%})")


@dataclass(frozen=True)
class CandidateTemperature:
    """What a candidate temperature offers.

    Attributes
    ----------
    temperature_K : float
    D_cm2_per_s : float
        Expected D.
    hop_rate_per_ion_per_ps : float, 1/ps
    effective_hops_per_ps : float, 1/ps
        N_eff gained per ps of simulation (all ions).
    min_length_ps : float, ps
        Shortest run the minimum-hop rules allow.
    cost_per_ps : float
    usable : bool
        False when even ``max_length_ps`` gives too few hops.
    chosen : bool
    length_ps : float
        Planned length (0 when not chosen).
    """

    temperature_K: float
    D_cm2_per_s: float
    hop_rate_per_ion_per_ps: float
    effective_hops_per_ps: float
    min_length_ps: float
    cost_per_ps: float
    usable: bool
    chosen: bool
    length_ps: float

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)


@dataclass(frozen=True)
class TemperatureSetOption:
    """The best plan with a given number of temperatures (for comparison).

    Attributes
    ----------
    n_temperatures : int
    temperatures_K : tuple of float
    length_ps : tuple of float, ps
    total_length_ps : float, ps
    total_cost : float
    planned_relative_error : float
    """

    n_temperatures: int
    temperatures_K: tuple
    length_ps: tuple
    total_length_ps: float
    total_cost: float
    planned_relative_error: float

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)


@dataclass(frozen=True, eq=False)
class CampaignPlan:
    """Result of :func:`plan_campaign`.

    Attributes
    ----------
    reachable : bool
        True when the plan meets the target.
    limited_by : str
        ``""``, ``"relative error floor"``, ``"maximum simulation length"`` or
        ``"too few usable temperatures"``.
    target_quantity : str
        ``"sigma"`` or ``"D"`` (same relative error; label only).
    target_temperature_K : float
    target_relative_error : float
        Asked-for relative standard error at the target temperature.
    runs : tuple of PlannedRun
        The suggested runs, lowest temperature first. When the target cannot be
        reached: the runs that come closest within the limits (every usable
        candidate at ``max_length_ps``), or none when only the floor limits.
    temperatures_K, length_ps : tuple of float
        The same, as columns (K, ps).
    total_length_ps : float, ps
    total_cost : float
        Σ cost_per_ps × length_ps (equal to the total length with unit weights).
    planned_relative_error : float
        Expected standard error of ln D (≈ relative error of D and σ) at the target.
    planned_Ea_stderr_eV : float
    best_achievable_relative_error : float
        The smallest relative error any allowed plan can reach (every usable candidate
        at the maximum length, or at the floor for unlimited lengths).
    Ea_eV : float
    D0_cm2_per_s : float
    D_target_cm2_per_s : float
        Expected D at the target temperature.
    D_target_interval95_cm2_per_s : (float, float)
        Expected 95% band of the extrapolated D, D ×/÷ exp(1.96 × planned error),
        around the expected value.
    interval95_factor : float
        exp(1.96 × planned error): the band's multiplicative half-width.
    sigma_target_S_per_cm : float or None
        Expected σ at the target (only when a volume was given).
    sigma_target_interval95_S_per_cm : (float, float) or None
    volume_A3 : float or None, Å³
        Volume used for that σ.
    haven_ratio : float
        Haven ratio used for that σ (stated with it; it does not change the relative
        error).
    n_ions : int
    jump_distance_A : float, Å
    dimension : int
    min_effective_hops, min_hops_per_ion : float
    max_length_ps : float or None, ps
    precision_model : PrecisionModel
    candidates : tuple of CandidateTemperature
    options : tuple of TemperatureSetOption
        The best plan for each number of temperatures that can reach the target.
    Ea_sensitivity : tuple of (float, float)
        (true Ea in eV, relative error at the target) if the runs are made as
        planned but Ea differs from the guess (D at the reference temperature held).
    messages : tuple of str
    """

    reachable: bool
    limited_by: str
    target_quantity: str
    target_temperature_K: float
    target_relative_error: float
    runs: tuple
    temperatures_K: tuple
    length_ps: tuple
    total_length_ps: float
    total_cost: float
    planned_relative_error: float
    planned_Ea_stderr_eV: float
    best_achievable_relative_error: float
    Ea_eV: float
    D0_cm2_per_s: float
    D_target_cm2_per_s: float
    D_target_interval95_cm2_per_s: tuple
    interval95_factor: float
    sigma_target_S_per_cm: object
    sigma_target_interval95_S_per_cm: object
    volume_A3: object
    haven_ratio: float
    n_ions: int
    jump_distance_A: float
    dimension: int
    min_effective_hops: float
    min_hops_per_ion: float
    max_length_ps: object
    precision_model: PrecisionModel
    candidates: tuple
    options: tuple
    Ea_sensitivity: tuple
    messages: tuple = field(default=())

    def to_dict(self):
        """JSON-ready dict (nested results as dicts)."""
        return to_plain(self)

    def __repr__(self):
        Ts = ", ".join(f"{t:g}" for t in self.temperatures_K) or "none"
        state = "reachable" if self.reachable else f"NOT reachable ({self.limited_by})"
        return (f"CampaignPlan(target {self.target_relative_error:.1%} on "
                f"{self.target_quantity}({self.target_temperature_K:g} K): {state}; "
                f"T = [{Ts}] K, total {self.total_length_ps:.4g} ps, planned error "
                f"{self.planned_relative_error:.1%})")

    def to_text(self):
        """A readable, multi-line rendering of the plan (for the command line)."""
        q = "sigma" if self.target_quantity == "sigma" else "D"
        T0 = self.target_temperature_K
        lines = []
        lines.append(f"Campaign plan: {self.target_relative_error:.1%} relative error on "
                     f"{q}({T0:g} K)" + (" (the same as on D)" if q == "sigma" else ""))
        lines.append(
            f"Assumed: Ea = {self.Ea_eV:.3g} eV, D0 = {self.D0_cm2_per_s:.3g} cm²/s, "
            f"{self.n_ions} mobile ions, jump distance {self.jump_distance_A:g} Å, "
            f"{self.dimension}D")
        lines.append(f"Per-run precision: {self.precision_model} ({self.precision_model.source})")
        lines.append("")
        if self.reachable:
            lines.append(f"Target reachable. Suggested runs ({len(self.runs)} temperatures):")
        else:
            lines.append(f"Target NOT reachable ({self.limited_by}).")
            if self.runs:
                lines.append("Closest plan within the limits:")
        if self.runs:
            lines.append(f"  {'T (K)':>7} {'length (ps)':>12} {'N_eff':>9} {'hops/ion':>9} "
                         f"{'RSD(D)':>7} {'save every (ps)':>16} {'cost':>10}")
            for r in self.runs:
                mark = " (minimum)" if r.at_minimum_length else ""
                lines.append(
                    f"  {r.temperature_K:7g} {r.length_ps:12.4g} {r.effective_hops:9.4g} "
                    f"{r.hops_per_ion:9.3g} {r.D_relative_error:7.1%} "
                    f"{r.max_frame_interval_ps:16.3g} {r.cost:10.4g}{mark}")
            lines.append(f"  Total simulated time: {self.total_length_ps:.4g} ps "
                         f"(cost {self.total_cost:.4g})")
            lo, hi = self.D_target_interval95_cm2_per_s
            lines.append(
                f"Planned relative error at {T0:g} K: {self.planned_relative_error:.1%}; "
                f"expected D({T0:g} K) = {self.D_target_cm2_per_s:.3g} cm²/s, 95% band "
                f"[{lo:.3g}, {hi:.3g}] cm²/s (×/÷ {self.interval95_factor:.3g})")
            if self.sigma_target_S_per_cm is not None:
                slo, shi = self.sigma_target_interval95_S_per_cm
                ms = MS_PER_S
                lines.append(f"  expected sigma({T0:g} K) = {self.sigma_target_S_per_cm * ms:.3g} "
                             f"mS/cm, 95% band [{slo * ms:.3g}, {shi * ms:.3g}] mS/cm "
                             f"(Haven ratio {self.haven_ratio:g})")
            lines.append(f"Planned standard error of Ea: {self.planned_Ea_stderr_eV:.2g} eV")
            if self.Ea_sensitivity:
                parts = [f"Ea = {ea:.3g} eV -> {err:.1%}" for ea, err in self.Ea_sensitivity]
                lines.append("If Ea differs from the guess (same run lengths): " + "; ".join(parts))
        best = self.best_achievable_relative_error
        if not math.isfinite(best):
            best_text = "none (no plan possible)"
        elif best == 0:
            best_text = "no limit (no error floor and no maximum length)"
        else:
            best_text = f"{best:.1%}"
        lines.append("Best relative error reachable within the limits: " + best_text)
        if len(self.options) > 1:
            lines.append("Best plan per number of temperatures:")
            for o in self.options:
                Ts = ", ".join(f"{t:g}" for t in o.temperatures_K)
                lines.append(f"  {o.n_temperatures}: [{Ts}] K, total {o.total_length_ps:.4g} ps "
                             f"(cost {o.total_cost:.4g})")
        for m in self.messages:
            lines.append("Note: " + m)
        return "\n".join(lines)


# --------------------------------------------------------------------------- input checks




def _temperatures(values):
    try:
        T = np.asarray(values, dtype=float).reshape(-1)
    except (TypeError, ValueError) as exc:
        raise InputError(f"candidate_temperatures_K: expected a sequence of temperatures in K, "
                         f"got {values!r}") from exc
    for i, t in enumerate(T):
        if not (math.isfinite(t) and t > 0):
            raise InputError(f"candidate_temperatures_K: entry {i} is {t!r}; expected a finite "
                             "temperature > 0 K")
    uniq = np.unique(T)
    if len(uniq) < len(T):
        warnings.warn(f"candidate_temperatures_K: duplicate temperatures dropped "
                      f"({len(T) - len(uniq)} repeated)", DiffkitWarning, stacklevel=3)
    return uniq


def _costs(cost_per_ps, T_in, T):
    if cost_per_ps is None:
        return np.ones(len(T))
    c = np.asarray(cost_per_ps, dtype=float)
    if c.ndim == 0:
        c = np.full(len(T), float(c))
    else:
        c = c.reshape(-1)
        if len(c) != len(np.asarray(T_in).reshape(-1)):
            raise InputError(f"cost_per_ps: expected one weight or one per candidate temperature "
                             f"({len(np.asarray(T_in).reshape(-1))}), got {len(c)}")
        order = np.asarray(T_in, dtype=float).reshape(-1)
        c = np.array([c[int(np.nonzero(order == t)[0][0])] for t in T])
    for t, v in zip(T, c):
        if not (math.isfinite(v) and v > 0):
            raise InputError(f"cost_per_ps at {t:g} K is {v!r}; expected a positive weight")
    return c


# --------------------------------------------------------------------------- allocation


class _Problem:
    """Allocation of run lengths over one set of temperatures."""

    def __init__(self, x, rate, cost, lo, hi, x0, eps, model):
        self.x, self.r, self.c = x, rate, cost          # 1/eV, N_eff per ps, cost per ps
        self.lo, self.hi = lo, hi                        # ps (hi may be inf)
        self.x0, self.eps2 = x0, eps * eps
        self.A, self.B = model.hop_coefficient, model.relative_error_floor

    def sigma(self, t):
        return self.A / np.sqrt(self.r * t) + self.B

    def var(self, t):
        return _line_variances(self.x, 1.0 / self.sigma(t) ** 2, self.x0)[0]

    def var_limit(self):
        """Smallest variance the bounds allow (every run as long as allowed)."""
        if np.all(np.isfinite(self.hi)):
            return self.var(self.hi)
        if self.B == 0:
            return 0.0
        s = np.where(np.isfinite(self.hi), self.sigma(np.where(np.isfinite(self.hi), self.hi, 1.0)),
                     self.B)
        return _line_variances(self.x, 1.0 / s ** 2, self.x0)[0]

    def _scale_until_met(self, t, free):
        """Multiply the free entries of t by the smallest k ≥ 0 that meets the target.

        Secant steps in log k on log var (exact in one step for B = 0 without
        clipping), then bisection to guarantee the result. None if unreachable.
        """
        def trial(k):
            return np.where(free, np.clip(k * t, self.lo, self.hi), t)

        k = 1.0
        v = self.var(trial(k))
        for _ in range(30):
            if abs(v / self.eps2 - 1.0) < 1e-9 and v <= self.eps2:
                return trial(k)
            k_new = k * (v / self.eps2) * (1.0 + (1e-10 if v > self.eps2 else 0.0))
            if not math.isfinite(k_new) or k_new <= 0:
                break
            v_new = self.var(trial(k_new))
            if v_new == v:
                break
            k, v = k_new, v_new
        # bisection bracket
        lo_k, hi_k = (k, k) if v > self.eps2 else (k, k)
        if v > self.eps2:
            while self.var(trial(hi_k)) > self.eps2:
                hi_k *= 2.0
                if hi_k > 1e30 * max(k, 1.0):
                    return None
        else:
            while lo_k > 1e-30 and self.var(trial(lo_k)) <= self.eps2:
                lo_k /= 2.0
        for _ in range(100):
            if hi_k / lo_k < 1 + 1e-10:
                break
            mid = math.sqrt(lo_k * hi_k)
            if self.var(trial(mid)) > self.eps2:
                lo_k = mid
            else:
                hi_k = mid
        return trial(hi_k)

    def solve(self):
        """Cheapest feasible lengths (ps), or None when the target cannot be met."""
        if self.var(self.lo) <= self.eps2:
            return self.lo.copy()
        if self.var_limit() > self.eps2 * (1 + 1e-9):
            return None
        # start: lengths in proportion to 1/sqrt(c r) × |lever| (exact for two points, B = 0)
        w_unit = self.r  # weights per ps at B = 0, up to the constant 1/A²
        _, _, grad = _line_variances(self.x, w_unit, self.x0)
        lever = np.sqrt(np.maximum(-grad, 1e-30))
        base = lever / np.sqrt(self.c * self.r)
        base = base / base.max() * max(float(self.lo.max()), 1e-6)
        start = self._scale_until_met(base, np.ones(len(base), bool))
        if start is None:
            return None
        # second start: every run at its minimum but the best pair (Elfving), scaled up
        pair = _pair_costs(self.x, self.r, self.c, self.x0, 1.0, self.A)
        i, j = np.unravel_index(int(np.argmin(pair)), pair.shape)
        if math.isfinite(pair[i, j]):
            t2 = self.lo.copy()
            for p, q in ((i, j), (j, i)):
                alpha = abs((self.x0 - self.x[q]) / (self.x[p] - self.x[q]))
                t2[p] = max(self.lo[p], alpha / math.sqrt(self.c[p] * self.r[p]))
            free = np.zeros(len(t2), bool)
            free[[i, j]] = True
            t2 = self._scale_until_met(t2, free)
            if t2 is not None and float(self.c @ t2) < float(self.c @ start):
                start = t2
        best, best_cost = start, float(self.c @ start)
        scale = best_cost

        # the problem is convex in t (w(t) concave increasing, var convex decreasing in w):
        # SLSQP on t scaled by the start, linear objective, one smooth constraint
        t_scale = start.copy()

        def fun(y):
            t = y * t_scale
            return float(self.c @ t) / scale, self.c * t_scale / scale

        def con(y):
            return 1.0 - self.var(y * t_scale) / self.eps2

        def con_jac(y):
            t = y * t_scale
            s = self.sigma(t)
            _, _, dv_dw = _line_variances(self.x, 1.0 / s ** 2, self.x0)
            dw_dt = self.A / np.sqrt(self.r * t) / s ** 3 / t
            return -(dv_dw * dw_dt) * t_scale / self.eps2

        bounds = [(l / s, None if not math.isfinite(h) else h / s)
                  for l, h, s in zip(self.lo, self.hi, t_scale)]
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = _opt.minimize(fun, np.ones(len(start)), jac=True, method="SLSQP",
                                bounds=bounds,
                                constraints=[{"type": "ineq", "fun": con, "jac": con_jac}],
                                options={"maxiter": 200, "ftol": 1e-10})
        t = np.clip(res.x * t_scale, self.lo, self.hi)
        if self.var(t) > self.eps2:
            # scale the free runs up until the constraint holds exactly
            scaled = self._scale_until_met(t, t < self.hi)
            t = t if scaled is None else scaled
        if self.var(t) <= self.eps2 * (1 + 1e-9) and float(self.c @ t) < best_cost:
            best = t
        return best


def _pair_costs(x, rate, cost, x0, eps, A):
    """Least cost of a two-temperature plan with no length bounds and no floor, (m, m).

    Through two points the line at x0 is the Lagrange combination
    ln D(x0) = α_i ln D_i + α_j ln D_j, α_i = (x0 − x_j)/(x_i − x_j); with
    var_i = A²/(r_i t_i) the cheapest lengths give the total cost
    (A |α_i| √(c_i/r_i) + A |α_j| √(c_j/r_j))² / ε² (Cauchy–Schwarz). By Elfving's
    theorem a c-optimal design for a straight line needs at most two points, so the
    minimum over the pairs of a set bounds any plan on that set from below.
    The diagonal is inf (one point cannot fix a line unless x0 equals it).
    """
    m = len(x)
    out = np.full((m, m), np.inf)
    for i in range(m):
        for j in range(m):
            if i == j or x[i] == x[j] or not (rate[i] > 0 and rate[j] > 0):
                continue
            ai = (x0 - x[j]) / (x[i] - x[j])
            aj = (x0 - x[i]) / (x[j] - x[i])
            out[i, j] = (A * abs(ai) * math.sqrt(cost[i] / rate[i])
                         + A * abs(aj) * math.sqrt(cost[j] / rate[j])) ** 2 / eps ** 2
    return out


# --------------------------------------------------------------------------- the planner


def plan_campaign(*, Ea_eV, candidate_temperatures_K, n_ions, jump_distance_A,
                  target_relative_error, D_cm2_per_s=None, at_temperature_K=None,
                  D0_cm2_per_s=None, target_temperature_K=300.0, target_quantity="sigma",
                  dimension=3, cost_per_ps=None, max_length_ps=None, min_length_ps=0.0,
                  min_effective_hops=None, min_hops_per_ion=3.0, min_temperatures=3,
                  precision=None, volume_A3=None, charge=1, haven_ratio=1.0,
                  Ea_sensitivity_eV=0.05):
    """Run lengths and temperatures that reach a target precision at 300 K most cheaply.

    Parameters
    ----------
    Ea_eV : float, eV
        Expected activation energy (≥ 0).
    candidate_temperatures_K : (m,) float, K
        Temperatures one could simulate (2 ≤ m ≤ 12 distinct values).
    n_ions : int
        Mobile ions in the cell.
    jump_distance_A : float, Å
        Jump distance a between sites.
    target_relative_error : float
        Wanted relative standard error of σ (= of D) at the target temperature,
        e.g. 0.2 for 20%.
    D_cm2_per_s, at_temperature_K : float, cm²/s and K
        Expected D at one temperature; give these or ``D0_cm2_per_s``.
    D0_cm2_per_s : float, cm²/s
        Expected prefactor instead.
    target_temperature_K : float, K
    target_quantity : {"sigma", "D"}
        Label of the target (the relative error is the same).
    dimension : {1, 2, 3}
        d in N_eff = n · 2d · D · t / a².
    cost_per_ps : float or (m,) float, optional
        Cost weight of one ps at each candidate (e.g. core-hours per ps); default
        equal, so the total cost is the total simulated time.
    max_length_ps : float, ps, optional
        Longest run allowed.
    min_length_ps : float, ps
        Shortest run allowed.
    min_effective_hops : float, optional
        Each run must expect at least this N_eff; default the N_eff below which the
        run verdict (:class:`diffkit.trust.TrustThresholds`, ``good_effective_hops``)
        warns (50).
    min_hops_per_ion : float
        Each run must expect at least this many hops per ion (default 3, the
        lowest value the precision model was calibrated at).
    min_temperatures : int
        Fewest temperatures in a plan (default 3: a curvature and a
        leave-one-out check need three; 2 is allowed).
    precision : PrecisionModel, optional
        Default :func:`default_precision_model`.
    volume_A3 : float, Å³, optional
        Cell volume, to also state the expected σ at the target and its band.
    charge, haven_ratio : float
        For that σ only.
    Ea_sensitivity_eV : float, eV
        Report the achieved error if the true Ea is this much higher or lower.

    Returns
    -------
    CampaignPlan

    Raises
    ------
    InputError
        Non-physical or missing values.
    UsageError
        Contradictory options (both D forms, too few candidates, ...).
    """
    if target_quantity not in ("sigma", "D"):
        raise UsageError(f"target_quantity must be 'sigma' or 'D', got {target_quantity!r}")
    Ea = positive_number("Ea_eV", Ea_eV, allow_zero=True)
    if Ea > _SUSPICIOUS_EA_EV:
        warnings.warn(f"Ea_eV = {Ea:g} is far above activation energies of ion conductors; "
                      "is it in kJ/mol or kcal/mol? (1 eV = 96.485 kJ/mol)", DiffkitWarning,
                      stacklevel=2)
    T_in = candidate_temperatures_K
    T = _temperatures(T_in)
    n = positive_number("n_ions", n_ions)
    if n != int(n):
        raise InputError(f"n_ions: expected a whole number of ions, got {n_ions!r}")
    n = int(n)
    a = positive_number("jump_distance_A", jump_distance_A)
    eps = positive_number("target_relative_error", target_relative_error)
    T0 = positive_number("target_temperature_K", target_temperature_K)
    if dimension not in (1, 2, 3):
        raise InputError(f"dimension: expected 1, 2 or 3, got {dimension!r}")
    costs = _costs(cost_per_ps, T_in, T)
    t_max = math.inf if max_length_ps is None else positive_number("max_length_ps", max_length_ps)
    t_min = positive_number("min_length_ps", min_length_ps, allow_zero=True)
    if t_min > t_max:
        raise UsageError(f"min_length_ps ({t_min:g}) exceeds max_length_ps ({t_max:g})")
    good_hops, hops_per_frame = _trust_defaults()
    n_min = positive_number("min_effective_hops", good_hops if min_effective_hops is None
                      else min_effective_hops, allow_zero=True)
    hpi_min = positive_number("min_hops_per_ion", min_hops_per_ion, allow_zero=True)
    if isinstance(min_temperatures, bool) or int(min_temperatures) != min_temperatures \
            or min_temperatures < 2:
        raise UsageError(f"min_temperatures must be a whole number ≥ 2, got {min_temperatures!r}")
    k_min = int(min_temperatures)
    if len(T) < 2:
        raise UsageError(f"an Arrhenius campaign needs at least two candidate temperatures; got "
                         f"{len(T)}")
    if len(T) > _MAX_CANDIDATES:
        raise UsageError(f"at most {_MAX_CANDIDATES} candidate temperatures can be searched; got "
                         f"{len(T)} (thin the list)")
    if k_min > len(T):
        raise UsageError(f"min_temperatures = {k_min} but only {len(T)} candidate temperatures")
    model = default_precision_model() if precision is None else precision
    if not isinstance(model, PrecisionModel):
        raise UsageError(f"precision: expected a PrecisionModel, got {type(model).__name__}")
    dEa = positive_number("Ea_sensitivity_eV", Ea_sensitivity_eV, allow_zero=True)

    # the expected Arrhenius law
    if D0_cm2_per_s is not None:
        if D_cm2_per_s is not None or at_temperature_K is not None:
            raise UsageError("give either D0_cm2_per_s or D_cm2_per_s with at_temperature_K, "
                             "not both")
        D0 = positive_number("D0_cm2_per_s", D0_cm2_per_s)
        T_ref, D_ref = None, None
    else:
        if D_cm2_per_s is None or at_temperature_K is None:
            raise UsageError("give the expected D_cm2_per_s with at_temperature_K (or the "
                             "prefactor D0_cm2_per_s)")
        D_ref = positive_number("D_cm2_per_s", D_cm2_per_s)
        T_ref = positive_number("at_temperature_K", at_temperature_K)
        if D_ref > _SUSPICIOUS_D_CM2_PER_S:
            warnings.warn(
                f"D_cm2_per_s = {D_ref:.3g} is far above diffusivities in solids; it looks like "
                f"a value in Å²/ps (1 Å²/ps = {A2_PER_PS_IN_CM2_PER_S:g} cm²/s)",
                DiffkitWarning, stacklevel=2)
        ln_D0 = math.log(D_ref) + Ea / (K_B_EV_PER_K * T_ref)
        if ln_D0 > 700:
            raise InputError(f"the prefactor implied by D_cm2_per_s = {D_ref:g} at "
                             f"{T_ref:g} K and Ea = {Ea:g} eV overflows; check the units")
        D0 = math.exp(ln_D0)

    def D_of(Tv, ea=Ea):
        x = _x_of(Tv)
        if D_ref is None:
            return D0 * np.exp(-ea * x)
        return D_ref * np.exp(-ea * (x - float(_x_of(T_ref))))

    messages = []
    D_T = D_of(T)
    D_A2ps = cm2s_to_a2ps(D_T)
    jump_rate = 2 * dimension * D_A2ps / a ** 2               # per ion per ps
    neff_rate = n * jump_rate                                 # N_eff per ps
    with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
        t_lo = np.maximum.reduce([np.full(len(T), t_min), n_min / neff_rate,
                                  hpi_min / jump_rate])
    t_lo = np.where(np.isfinite(t_lo), t_lo, math.inf)
    t_lo = np.maximum(t_lo, 1e-9 * max(1.0, float(np.min(t_lo[np.isfinite(t_lo)], initial=1.0))))
    usable = t_lo <= min(t_max, _LONGEST_PS)
    for i in np.nonzero(~usable)[0]:
        if t_lo[i] <= _LONGEST_PS:
            messages.append(
                f"{T[i]:g} K is too slow to use: even {t_max:g} ps gives only "
                f"{neff_rate[i] * t_max:.3g} effective hops ({jump_rate[i] * t_max:.3g} per "
                f"ion); the minimum is {n_min:g} ({hpi_min:g} per ion).")
        else:
            messages.append(f"{T[i]:g} K is unusable: the expected D there ({D_T[i]:.3g} "
                            f"cm²/s) needs runs longer than {_LONGEST_PS:g} ps for the minimum "
                            "number of hops.")
    x_all = _x_of(T)
    x0 = float(_x_of(T0))
    hi_all = np.full(len(T), t_max)
    idx_usable = np.nonzero(usable)[0]

    def problem(idx):
        return _Problem(x_all[idx], neff_rate[idx], costs[idx], t_lo[idx], hi_all[idx], x0, eps,
                        model)

    # best any plan can do: every usable candidate as long as allowed
    if len(idx_usable) >= 2:
        best_var = problem(idx_usable).var_limit()
    else:
        best_var = math.inf
    best_err = math.sqrt(best_var)
    if model.relative_error_floor > 0 and len(idx_usable) >= 2:
        floor_var = _line_variances(x_all[idx_usable],
                                    np.full(len(idx_usable), model.relative_error_floor ** -2),
                                    x0)[0]
    else:
        floor_var = 0.0 if len(idx_usable) >= 2 else math.inf

    # search the subsets, cheapest lower bound first; a subset is skipped when its lower
    # bound (the minimum lengths, or the best two-point design without any bounds and
    # without the floor, which no plan on the subset can beat) already exceeds the best
    # plan of its size
    pair = _pair_costs(x_all, neff_rate, costs, x0, eps, model.hop_coefficient)
    best = None   # (cost, idx, lengths)
    per_size = {}
    if len(idx_usable) >= k_min:
        for k in range(k_min, len(idx_usable) + 1):
            combos = []
            for combo in itertools.combinations(idx_usable, k):
                idx = np.array(combo)
                sub = pair[np.ix_(idx, idx)]
                lower = max(float(costs[idx] @ t_lo[idx]), float(sub.min()))
                combos.append((lower, idx))
            combos.sort(key=lambda item: item[0])
            for lower, idx in combos:
                if k in per_size and lower >= per_size[k][0]:
                    break
                t = problem(idx).solve()
                if t is None:
                    continue
                cost = float(costs[idx] @ t)
                if k not in per_size or cost < per_size[k][0]:
                    per_size[k] = (cost, idx, t)
                if best is None or cost < best[0] * (1 - 1e-9):
                    best = (cost, idx, t)

    def make_runs(idx, t):
        out = []
        for j, i in enumerate(idx):
            neff = float(neff_rate[i] * t[j])
            out.append(PlannedRun(
                temperature_K=float(T[i]), length_ps=float(t[j]), effective_hops=neff,
                hops_per_ion=float(jump_rate[i] * t[j]), D_cm2_per_s=float(D_T[i]),
                D_relative_error=float(model.relative_error(neff)),
                hop_rate_per_ion_per_ps=float(jump_rate[i]),
                max_frame_interval_ps=float(min(hops_per_frame, 1.0 / _FRAMES_PER_RESIDENCE)
                                        / jump_rate[i]),
                cost_per_ps=float(costs[i]), cost=float(costs[i] * t[j]),
                at_minimum_length=bool(t[j] <= t_lo[i] * (1 + 1e-6))))
        return tuple(out)

    if best is not None:
        reachable, limited_by = True, ""
        _, idx, t = best
        runs = make_runs(idx, t)
        planned_var = problem(idx).var(t)
    else:
        reachable = False
        if len(idx_usable) < max(k_min, 2):
            limited_by = "too few usable temperatures"
            messages.append(
                f"only {len(idx_usable)} candidate temperature(s) give enough hops within the "
                f"maximum length; at least {max(k_min, 2)} are needed. Add hotter temperatures "
                "or allow longer runs.")
            runs, planned_var, idx = (), math.inf, np.array([], int)
        elif floor_var > eps * eps:
            limited_by = "relative error floor"
            messages.append(
                f"the per-run error floor B = {model.relative_error_floor:.3g} alone limits the "
                f"relative error at {T0:g} K to {math.sqrt(floor_var):.1%} with every candidate "
                f"temperature, above the target {eps:.1%}: no run length reaches it. Add "
                "candidate temperatures closer to the target or accept a larger error.")
            if math.isfinite(t_max):
                idx = idx_usable
                t = hi_all[idx]
                runs, planned_var = make_runs(idx, t), problem(idx).var(t)
            else:
                runs, planned_var, idx = (), floor_var, np.array([], int)
        else:
            limited_by = "maximum simulation length"
            idx = idx_usable
            t = hi_all[idx]
            runs, planned_var = make_runs(idx, t), problem(idx).var(t)
            messages.append(
                f"with every usable candidate at the maximum length ({t_max:g} ps) the relative "
                f"error at {T0:g} K is {math.sqrt(planned_var):.1%}, above the target "
                f"{eps:.1%}. Allow longer runs, more mobile ions, or hotter temperatures.")
    planned_err = math.sqrt(planned_var) if math.isfinite(planned_var) else math.inf

    if runs:
        rel = np.array([r.D_relative_error for r in runs])
        Tr = np.array([r.temperature_K for r in runs])
        prec = extrapolation_precision(Tr, rel, target_temperature_K=T0)
        Ea_se = prec.Ea_stderr_eV
    else:
        Ea_se = math.inf

    # sensitivity to the Ea guess (same lengths, D at the reference temperature held)
    sens = []
    if runs and dEa > 0:
        lengths = np.array([r.length_ps for r in runs])
        Tr = np.array([r.temperature_K for r in runs])
        for ea in (Ea - dEa, Ea + dEa):
            if ea < 0:
                continue
            neff = n * 2 * dimension * cm2s_to_a2ps(D_of(Tr, ea)) * lengths / a ** 2
            sens.append((float(ea), float(extrapolation_precision(
                Tr, model.relative_error(neff), target_temperature_K=T0).relative_error)))
        if D_ref is None:
            messages.append("Ea sensitivity holds D0 fixed (no reference D was given).")

    D_target = float(D_of(T0))
    factor = math.exp(_Z95 * planned_err) if math.isfinite(planned_err) else math.inf
    band = (D_target / factor, D_target * factor)
    sigma_t = sigma_band = None
    if volume_A3 is not None:
        from .conductivity import nernst_einstein  # one direction: planning uses conductivity
        s = nernst_einstein(D_target, n_ions=n, volume_A3=volume_A3, temperature_K=T0,
                            charge=charge, haven_ratio=haven_ratio).sigma_S_per_cm
        sigma_t, sigma_band = s, (s / factor, s * factor)

    chosen = {int(i): float(t_) for i, t_ in zip(idx, [r.length_ps for r in runs])}
    candidates = tuple(CandidateTemperature(
        temperature_K=float(T[i]), D_cm2_per_s=float(D_T[i]),
        hop_rate_per_ion_per_ps=float(jump_rate[i]), effective_hops_per_ps=float(neff_rate[i]),
        min_length_ps=float(t_lo[i]), cost_per_ps=float(costs[i]), usable=bool(usable[i]),
        chosen=i in chosen, length_ps=chosen.get(i, 0.0)) for i in range(len(T)))
    options = tuple(TemperatureSetOption(
        n_temperatures=k, temperatures_K=tuple(float(T[i]) for i in v[1]),
        length_ps=tuple(float(x) for x in v[2]), total_length_ps=float(np.sum(v[2])),
        total_cost=float(v[0]), planned_relative_error=float(math.sqrt(problem(v[1]).var(v[2]))))
        for k, v in sorted(per_size.items()))

    if runs and any(r.at_minimum_length for r in runs) and reachable:
        messages.append("runs marked (minimum) are as short as the minimum-hop rules allow; "
                        "they add checks (curvature, leave-one-out) more than precision.")
    if runs and n < 10:
        messages.append(
            f"with only {n} mobile ions each run's error bar rests on few ions and is itself "
            "uncertain, so the Arrhenius fit's weights scatter: in synthetic checks with 5 ions "
            "the achieved error at the target was about 1.4 times the plan.")
    if runs and T0 < min(r.temperature_K for r in runs):
        lowest = min(r.temperature_K for r in runs)
        messages.append(
            f"the plan extrapolates from {lowest:g} K and above to {T0:g} K: it assumes "
            "one mechanism and no phase change over the gap, and that Ea is close to the guess.")

    return CampaignPlan(
        reachable=reachable, limited_by=limited_by, target_quantity=target_quantity,
        target_temperature_K=T0, target_relative_error=eps, runs=runs,
        temperatures_K=tuple(r.temperature_K for r in runs),
        length_ps=tuple(r.length_ps for r in runs),
        total_length_ps=float(sum(r.length_ps for r in runs)),
        total_cost=float(sum(r.cost for r in runs)),
        planned_relative_error=planned_err, planned_Ea_stderr_eV=float(Ea_se),
        best_achievable_relative_error=best_err if math.isfinite(best_err) else math.inf,
        Ea_eV=Ea, D0_cm2_per_s=float(D0), D_target_cm2_per_s=D_target,
        D_target_interval95_cm2_per_s=band, interval95_factor=factor,
        sigma_target_S_per_cm=sigma_t, sigma_target_interval95_S_per_cm=sigma_band,
        volume_A3=None if volume_A3 is None else float(volume_A3), haven_ratio=float(haven_ratio),
        n_ions=n, jump_distance_A=a, dimension=int(dimension), min_effective_hops=n_min,
        min_hops_per_ion=hpi_min, max_length_ps=None if not math.isfinite(t_max) else t_max,
        precision_model=model, candidates=candidates, options=options,
        Ea_sensitivity=tuple(sens), messages=tuple(messages))
