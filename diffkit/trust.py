"""The verdict on one run: can its diffusion coefficient be trusted, and if not, why?

:func:`assess_run` counts hops (:mod:`diffkit.hops`), estimates D
(:mod:`diffkit.msd`, :mod:`diffkit.diffusion`) and runs a list of checks, each
with a status (``"pass"``, ``"warn"``, ``"fail"`` or ``"skipped"``), the figure
it judged, its thresholds and one plain sentence:

1. ``hops``            — enough effective hops, carried by more than a couple of ions;
2. ``diffusive``       — MSD minus its offset grows linearly (log–log slope ≈ 1) in the fit window;
3. ``converged``       — D from the first and second halves agree within their errors;
4. ``unwrap_safe``     — the largest move between saved frames is small against the cell;
5. ``hops_resolved``   — ions hop rarely enough per saved frame for hops to be seen one by one;
6. ``host_stable``     — the other species' MSD plateaus (no melting or amorphisation);
7. ``equilibrated``    — no drift of temperature (velocities) or volume; a ``start_ps`` is advised;
8. ``temperature``     — the kinetic temperature matches the nominal one.

The overall verdict is one of :data:`VERDICTS`: ``"solid"`` (everything passed),
``"tentative"`` (something to watch) or ``"inadequate"`` (a check failed).

With too few hops D is not fitted: it is reported as a one-sided upper bound
from the hop count (Poisson). With k hops observed, the expected count is below
N_up(k) = ½ χ²_{2(k+1)}(confidence) (for k = 0 and 95 %: −ln 0.05 ≈ 3.0), so

    D ≤ N_up a² / (2 d N_ions t_run),   d = 3,

with a the jump distance (the Einstein relation for uncorrelated hops; Mehrer,
*Diffusion in Solids*, 2007, ch. 4 — correlation only lowers D).

The expected relative error of D follows the effective-hop scaling of He, Zhu,
Epstein & Mo (npj Comput. Mater. 4, 18 (2018)), RSD ≈ A/√N_eff + B, with A and B
re-fitted on diffkit's own estimator (benchmarks/calibrate_hop_scaling.py).
See docs/methods_hops_and_verdict.md.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass, field

import numpy as np
from scipy import constants as _c
from scipy import stats as _stats

from .diffusion import DiffusionEstimate, estimate_diffusion
from .errors import InputError, UsageError
from .hops import DEFAULT_THRESHOLD_FRACTION, HopSummary, count_hops
from .msd import compute_msd
from .results import to_plain
from .units import AMU_KG, K_B_J_PER_K, a2ps_to_cm2s
from .unwrap import cell_heights

__all__ = ["RunAssessment", "CheckResult", "TrustThresholds", "assess_run",
           "poisson_upper_limit", "expected_relative_error", "kinetic_temperature_K",
           "VERDICTS", "CHECK_STATUSES", "RSD_A", "RSD_B"]

#: The three verdicts, best first.
VERDICTS = ("solid", "tentative", "inadequate")
#: Status of one check.
CHECK_STATUSES = ("pass", "warn", "fail", "skipped")

#: Effective-hop scaling of the relative error of D, RSD ≈ RSD_A / sqrt(N_eff) + RSD_B.
#: Fitted by ``python benchmarks/calibrate_hop_scaling.py --seeds 24`` (11 configurations
#: of simple-cubic hoppers, N_eff 25–40,000, 24 seeds each; diffkit's GLS estimator,
#: automatic window). He et al. (2018) report 3.43 and 0.04 for ab initio MD (from
#: memory); correlated real hops need more N_eff than these uncorrelated ones.
RSD_A = 1.04
RSD_B = 0.0004

#: Å/ps in m/s (SI prefixes from scipy.constants).
_A_PER_PS_IN_M_PER_S = _c.angstrom / _c.pico


# =========================================================================== settings
@dataclass(frozen=True)
class TrustThresholds:
    """Every threshold of the checks (all user-changeable; defaults documented here).

    Attributes
    ----------
    min_effective_hops : float
        Below this N_eff, D is only an upper bound and ``hops`` fails (default 10,
        expected relative error ≈ 35 %).
    good_effective_hops : float
        Below this N_eff, ``hops`` warns (default 50, ≈ 16 %).
    min_fraction_ions_moved : float
        ``hops`` warns when fewer ions than this fraction hopped at least once (0.1).
    few_movers : int
        ``hops`` warns when only this many ions or fewer carried the hops (2).
    linearity_warn, linearity_fail : float
        |slope − 1| of log(MSD − offset) against log t in the fit window (0.1, 0.3).
    convergence_warn_z, convergence_fail_z : float
        |D₁ − D₂| / sqrt(se₁² + se₂²) of the two halves (2, 3).
    step_fraction_warn, step_fraction_fail : float
        Largest move between saved frames as a fraction of the smallest cell height
        (0.25, 0.4 — the unwrapping limit of :mod:`diffkit.unwrap`).
    hops_per_frame_warn, hops_per_frame_fail : float
        Hops per ion per saved frame, counted or implied by D = Γ a²/6 (0.1, 0.3): with
        exponential residence, a fraction ≈ 1 − exp(−x) of the stays is shorter than a frame.
    host_growth_warn_A2, host_growth_fail_A2 : float, Å²
        Growth of a host species' MSD over the second half of its lags (0.25, 1.0).
    drift_warn, drift_fail : float
        Relative change of temperature or volume across the run (0.02, 0.05), counted
        only when it is also significant (``drift_z``).
    drift_z : float
        Significance of a drift, in standard errors of the fitted slope (3).
    temperature_warn, temperature_fail : float
        Relative mismatch of the kinetic and nominal temperature (0.05, 0.15).
    target_relative_error : float
        The relative error on D the advice aims for (0.1).
    confidence : float
        Confidence of the upper bound on D (0.95, one-sided).
    """

    min_effective_hops: float = 10.0
    good_effective_hops: float = 50.0
    min_fraction_ions_moved: float = 0.1
    few_movers: int = 2
    linearity_warn: float = 0.1
    linearity_fail: float = 0.3
    convergence_warn_z: float = 2.0
    convergence_fail_z: float = 3.0
    step_fraction_warn: float = 0.25
    step_fraction_fail: float = 0.4
    hops_per_frame_warn: float = 0.1
    hops_per_frame_fail: float = 0.3
    host_growth_warn_A2: float = 0.25
    host_growth_fail_A2: float = 1.0
    drift_warn: float = 0.02
    drift_fail: float = 0.05
    drift_z: float = 3.0
    temperature_warn: float = 0.05
    temperature_fail: float = 0.15
    target_relative_error: float = 0.1
    confidence: float = 0.95

    def __post_init__(self):
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
                raise UsageError(f"threshold {f.name} must be a number, got {v!r}")
            if not math.isfinite(v) or v < 0:
                raise UsageError(f"threshold {f.name} must be a finite number ≥ 0, got {v!r}")
        pairs = [("min_effective_hops", "good_effective_hops"),
                 ("linearity_warn", "linearity_fail"),
                 ("convergence_warn_z", "convergence_fail_z"),
                 ("step_fraction_warn", "step_fraction_fail"),
                 ("hops_per_frame_warn", "hops_per_frame_fail"),
                 ("host_growth_warn_A2", "host_growth_fail_A2"), ("drift_warn", "drift_fail"),
                 ("temperature_warn", "temperature_fail")]
        for lo, hi in pairs:
            if getattr(self, lo) > getattr(self, hi):
                raise UsageError(f"threshold {lo} ({getattr(self, lo)}) must not exceed "
                                 f"{hi} ({getattr(self, hi)})")
        for name in ("min_fraction_ions_moved",):
            if getattr(self, name) > 1:
                raise UsageError(f"threshold {name} is a fraction of the ions, in [0, 1]; "
                                 f"got {getattr(self, name)}")
        if self.step_fraction_fail > 0.5:
            raise UsageError(f"threshold step_fraction_fail must be at most 0.5 (beyond half "
                             f"the cell a move cannot be unwrapped); got {self.step_fraction_fail}")
        if not 0 < self.target_relative_error:
            raise UsageError(f"threshold target_relative_error must be positive, "
                             f"got {self.target_relative_error}")
        if not 0.5 <= self.confidence < 1:
            raise UsageError(f"threshold confidence must be in [0.5, 1), got {self.confidence}")
        if self.min_effective_hops <= 0:
            raise UsageError("threshold min_effective_hops must be positive, got "
                             f"{self.min_effective_hops}")

    def to_dict(self):
        """Plain JSON-ready dict."""
        return to_plain(self)


# =========================================================================== results
@dataclass(frozen=True)
class RunningEstimate:
    """D estimated from the leading part of a run, against that part's length.

    Attributes
    ----------
    times_ps : tuple of float, ps
        Length of the leading part used.
    D_cm2_per_s, lower_cm2_per_s, upper_cm2_per_s : tuple of float, cm²/s
        Estimate and its 95% interval (NaN where that part gives no fitted D).
    """

    times_ps: tuple
    D_cm2_per_s: tuple
    lower_cm2_per_s: tuple
    upper_cm2_per_s: tuple

    def to_dict(self):
        """Plain JSON-ready dict."""
        return to_plain(self)


@dataclass(frozen=True, repr=False)
class CheckResult:
    """One check of a run.

    Attributes
    ----------
    name : str
        Short identifier (``"hops"``, ``"diffusive"``, ...).
    title : str
        What is checked, in plain words.
    status : str
        ``"pass"``, ``"warn"``, ``"fail"`` or ``"skipped"``.
    figure : float
        The number judged (NaN when skipped).
    unit : str
        Unit or kind of ``figure``.
    threshold : str
        The thresholds, in words.
    explanation : str
        One sentence.
    """

    name: str
    title: str
    status: str
    figure: float
    unit: str
    threshold: str
    explanation: str

    @property
    def passed(self):
        """True if passed, False if it warned or failed, None if skipped."""
        return None if self.status == "skipped" else self.status == "pass"

    def to_dict(self):
        """Plain JSON-ready dict."""
        out = to_plain(self)
        out["passed"] = self.passed
        return out

    def __repr__(self):
        fig = "n/a" if not math.isfinite(self.figure) else f"{self.figure:.4g}"
        return f"CheckResult({self.name}: {self.status}, {fig} {self.unit} — {self.explanation})"


@dataclass(frozen=True, repr=False)
class RunAssessment:
    """Verdict, checks and advice for one run and one mobile species.

    Attributes
    ----------
    species : str
    temperature_K : float or None, K
    duration_ps : float, ps
    n_ions : int
    verdict : str
        One of :data:`VERDICTS`.
    checks : tuple of CheckResult
    advice : tuple of str
        Most useful first.
    diffusion : DiffusionEstimate
        D with its error bar, or (``is_upper_bound=True``) the hop-count bound.
    hops : HopSummary
    expected_relative_error : float
        RSD of D expected from N_eff (inf without hops).
    jump_distance_A : float, Å
        Jump distance used for the bound and N_eff.
    poisson_upper_hops : float
        One-sided upper limit on the expected hop count at ``thresholds.confidence``.
    D_hop_bound_cm2_per_s : float, cm²/s
        Upper bound on D from the hop count (reported as D when hops are too few).
    suggested_extension_ps : float or None, ps
        Extra simulated time for ``thresholds.target_relative_error`` (None: not
        needed, or not reachable by extending).
    suggested_start_ps : float or None, ps
        Where the equilibrated part starts, if the start is not equilibrated.
    kinetic_temperature_K : float or None, K
        Mean kinetic temperature from the velocities.
    thresholds : TrustThresholds
    message : str
        One-line summary.
    msd_curve : MSDCurve
        The MSD the estimate was fitted to (left out of ``to_dict()``: it is large).
    running : RunningEstimate or None
        D from the first quarter, half, three quarters and all of the run (None
        without a fitted D or with ``check_halves=False``).
    """

    species: str
    temperature_K: float | None
    duration_ps: float
    n_ions: int
    verdict: str
    checks: tuple
    advice: tuple
    diffusion: DiffusionEstimate
    hops: HopSummary
    expected_relative_error: float
    jump_distance_A: float
    poisson_upper_hops: float
    D_hop_bound_cm2_per_s: float
    suggested_extension_ps: float | None
    suggested_start_ps: float | None
    kinetic_temperature_K: float | None
    thresholds: TrustThresholds = field(default_factory=TrustThresholds)
    message: str = ""
    msd_curve: object = field(default=None, compare=False)
    running: object = None

    def check(self, name):
        """The check called ``name``."""
        for c in self.checks:
            if c.name == name:
                return c
        raise KeyError(f"no check named {name!r}; checks: {[c.name for c in self.checks]}")

    def to_dict(self):
        """Plain JSON-ready dict (without the full MSD curve; use ``msd_curve.to_dict()``)."""
        out = to_plain(dataclasses.replace(self, msd_curve=None))
        out.pop("msd_curve", None)
        return out

    def __repr__(self):
        first = self.advice[0] if self.advice else ""
        marks = " ".join(f"{c.name}:{c.status}" for c in self.checks)
        return (f"RunAssessment({self.species}, {self.duration_ps:g} ps: {self.verdict.upper()} — "
                f"{self.message} [{marks}] First advice: {first})")


# =========================================================================== helpers
def poisson_upper_limit(k, confidence=0.95):
    """One-sided upper limit on a Poisson mean after observing ``k`` events.

    N_up solves P(X ≤ k | N_up) = 1 − confidence, i.e. N_up = ½ χ²_{2(k+1)}(confidence)
    (standard result; for k = 0 it is −ln(1 − confidence)).

    Parameters
    ----------
    k : int
        Events observed (≥ 0).
    confidence : float

    Returns
    -------
    float
    """
    k = int(k)
    if k < 0:
        raise UsageError(f"poisson_upper_limit: k must be ≥ 0, got {k}")
    if not 0 < confidence < 1:
        raise UsageError(f"poisson_upper_limit: confidence must be in (0, 1), got {confidence}")
    return float(_stats.chi2.ppf(confidence, 2 * (k + 1)) / 2.0)


def expected_relative_error(n_effective_hops, A=None, B=None):
    """Relative standard error of D expected from N_eff: A/√N_eff + B (inf for N_eff ≤ 0)."""
    A = RSD_A if A is None else A
    B = RSD_B if B is None else B
    n = float(n_effective_hops)
    return math.inf if not n > 0 else A / math.sqrt(n) + B


def kinetic_temperature_K(velocities_A_per_ps, masses_amu, chunk=2048):
    """Kinetic temperature per frame, T = Σ m v² / (3 N k_B) (3N degrees of freedom).

    Parameters
    ----------
    velocities_A_per_ps : (n_frames, n_atoms, 3) float, Å/ps
    masses_amu : (n_atoms,) float, amu

    Returns
    -------
    (n_frames,) float, K
    """
    v = velocities_A_per_ps
    m = np.asarray(masses_amu, float)
    n = v.shape[0]
    out = np.empty(n)
    factor = AMU_KG * _A_PER_PS_IN_M_PER_S ** 2 / (3.0 * len(m) * K_B_J_PER_K)
    for s in range(0, n, chunk):
        block = np.asarray(v[s:s + chunk], float)
        out[s:s + chunk] = np.einsum("tki,tki,k->t", block, block, m) * factor
    return out


def _settling(x, t, drift_tol, z_tol, n_blocks=20):
    """How far the start of a series departs from its steady second half.

    The run is cut into ``n_blocks`` blocks. The reference is the mean of the
    second half; the noise of one block mean is the spread of the second-half
    block means. A block departs when it differs from the reference by more
    than ``drift_tol`` (relative) and by more than ``z_tol`` block-noise units.
    The second half must itself be steady: its linear trend over its span must
    not be both larger than ``drift_tol`` and significant at ``z_tol``.

    Returns
    -------
    worst : float
        Largest relative departure of a departing block (or of the second-half
        trend), 0 if none.
    start : int or None
        First frame after the last departing block of the first half (0 if
        none departs); None if the second half drifts.
    """
    n = len(x)
    nb = min(n_blocks, n // 4)
    if nb < 4:
        return 0.0, 0
    edges = np.linspace(0, n, nb + 1).astype(int)
    means = np.array([x[a:b].mean() for a, b in zip(edges[:-1], edges[1:])])
    late = means[nb // 2:]
    ref = float(late.mean())
    if ref == 0:
        return 0.0, 0
    noise = float(late.std(ddof=1)) if len(late) > 1 else 0.0
    # steady second half?
    tm = np.array([t[a:b].mean() for a, b in zip(edges[:-1], edges[1:])])[nb // 2:]
    fit = _stats.linregress(tm, late)
    trend = abs(fit.slope * (tm[-1] - tm[0]) / ref)
    trend_z = abs(fit.slope) / fit.stderr if fit.stderr > 0 else (math.inf if fit.slope else 0.0)
    if trend > drift_tol and trend_z > z_tol:
        return float(trend), None
    dev = np.abs(means - ref)
    departs = (dev / abs(ref) > drift_tol) & (dev > z_tol * noise)
    departs[nb // 2:] = False
    if not departs.any():
        return 0.0, 0
    last = int(np.flatnonzero(departs)[-1])
    return float(np.max(dev[departs]) / abs(ref)), int(edges[last + 1])


def _status(value, warn, fail, higher_is_worse=True):
    if not math.isfinite(value):
        return "fail"
    if higher_is_worse:
        return "fail" if value > fail else "warn" if value > warn else "pass"
    return "fail" if value < fail else "warn" if value < warn else "pass"


def _bound_estimate(est, D_bound_A2ps, message):
    """The diffusion estimate turned into an upper bound."""
    D_cm2 = float(a2ps_to_cm2s(D_bound_A2ps))
    return dataclasses.replace(
        est, D_A2_per_ps=float(D_bound_A2ps), D_stderr_A2_per_ps=math.nan,
        D_interval95_A2_per_ps=(0.0, float(D_bound_A2ps)), D_cm2_per_s=D_cm2,
        D_stderr_cm2_per_s=math.nan, D_interval95_cm2_per_s=(0.0, D_cm2), is_upper_bound=True,
        message=message, dimensionality="localised")


def _fmt_D(est):
    if est.is_upper_bound:
        return f"D < {est.D_cm2_per_s:.3g} cm²/s (upper bound)"
    if not math.isfinite(est.D_cm2_per_s):
        return "no D"
    return f"D = {est.D_cm2_per_s:.3g} ± {est.D_stderr_cm2_per_s:.2g} cm²/s"


# =========================================================================== main entry
def assess_run(traj, species, *, reference=None, window=None, method="gls",
               hop_method="displacement", hop_threshold_A=None, jump_distance_A=None,
               thresholds=None, check_halves=True, memory_budget_MB=256.0, progress=None):
    """Verdict, checks and advice on whether one run's D can be trusted.

    Parameters
    ----------
    traj : Trajectory
        Unwrapped trajectory (Å, ps), with velocities (Å/ps) where the file had them.
    species : str
        Mobile species.
    reference : {"framework", "all", "none"} or None
        Drift reference for the MSD and hops (None: "framework" where other
        species exist, else "none").
    window : (float, float) or None, ps
        Fit window for D; None chooses it (:func:`diffkit.diffusion.choose_fit_window`).
    method : {"gls", "ols", "bootstrap"}
        Estimator of :func:`diffkit.diffusion.estimate_diffusion`.
    hop_method : {"displacement", "sites"}
        Hop census method (:func:`diffkit.hops.count_hops`).
    hop_threshold_A : float, Å, optional
        Hop threshold (default: from the structure).
    jump_distance_A : float, Å, optional
        Jump distance a for N_eff and the upper bound (default: the mean jump
        distance seen, else the shortest distance between resting places).
    thresholds : TrustThresholds or dict, optional
        Thresholds of the checks (defaults in :class:`TrustThresholds`).
    check_halves : bool
        Run the convergence check (two more MSD fits on the halves).
    memory_budget_MB : float
    progress : callable, optional
        Called as ``progress(stages_done, n_stages)`` as the analysis advances.

    Returns
    -------
    RunAssessment

    Raises
    ------
    InputError
        Species absent; a run with a single frame.
    UsageError
        Thresholds or options that make no sense (each message names the option).
    """
    th = _thresholds(thresholds)
    if not isinstance(species, str):
        raise UsageError(f"assess_run: species must be one element symbol, got {species!r}")
    idx = traj.indices(species)           # InputError listing the species present
    if traj.n_frames < 2:
        raise InputError(f"assess_run: a run with a single frame has no dynamics; the trajectory "
                         f"has {traj.n_frames} frame(s)")
    h_min = float(cell_heights(np.asarray(traj.cells, float)).min())
    if jump_distance_A is not None:
        try:
            a_user = float(jump_distance_A)
        except (TypeError, ValueError):
            raise UsageError(f"jump_distance_A must be a number of Å, got {jump_distance_A!r}") \
                from None
        if not (math.isfinite(a_user) and 0 < a_user < 0.5 * h_min):
            raise UsageError(f"jump_distance_A must be positive and below half the smallest cell "
                             f"height ({0.5 * h_min:.4g} Å); got {jump_distance_A!r}")
    if math.sqrt(th.host_growth_fail_A2) >= h_min:
        raise UsageError(f"threshold host_growth_fail_A2 = {th.host_growth_fail_A2:g} Å² means a "
                         f"move of {math.sqrt(th.host_growth_fail_A2):.3g} Å, larger than the cell "
                         f"({h_min:.3g} Å between faces)")

    stages = [0]

    def tick():
        stages[0] += 1
        if progress is not None:
            progress(stages[0], 5)

    hops = count_hops(traj, species, method=hop_method, reference=reference,
                      threshold_A=hop_threshold_A, memory_budget_MB=memory_budget_MB)
    tick()
    curve = compute_msd(traj, species, reference=reference, memory_budget_MB=memory_budget_MB)
    est = estimate_diffusion(curve, window=window, method=method)
    tick()
    n_ions = len(idx)
    t_run = float(traj.duration_ps)
    dt = float(traj.frame_interval_ps)

    # ---- jump distance, N_eff, the hop-count bound
    if jump_distance_A is not None:
        a = float(jump_distance_A)
        n_eff = hops.total_squared_displacement_A2 / a ** 2 if hops.total_hops else 0.0
    else:
        for cand in (hops.mean_jump_distance_A, hops.resting_place_distance_A,
                     hops.threshold_A / DEFAULT_THRESHOLD_FRACTION):
            if math.isfinite(cand) and cand > 0:
                a = float(cand)
                break
        n_eff = hops.n_effective_hops
    k = hops.total_hops
    n_up = poisson_upper_limit(k, th.confidence)
    D_bound = n_up * a * a / (2 * 3 * n_ions * t_run) if t_run > 0 else math.inf
    D_bound_cm2 = float(a2ps_to_cm2s(D_bound))
    too_few = n_eff < th.min_effective_hops
    if too_few:
        est = _bound_estimate(est, D_bound, (
            f"too few hops for a fitted D ({k} hops, N_eff = {n_eff:.3g} < "
            f"{th.min_effective_hops:g}): D is below {D_bound_cm2:.3g} cm²/s with "
            f"{th.confidence:.0%} confidence (Poisson bound from the hop count, "
            f"a = {a:.3g} Å)"))
    rsd = expected_relative_error(n_eff)

    checks = []
    advice = []          # (priority, sentence); lower priority value comes first

    # ---- 1. hops
    movers = int(np.sum(hops.hops_per_ion > 0))
    status = _status(n_eff, th.good_effective_hops, th.min_effective_hops, higher_is_worse=False)
    why = (f"{k} hops by {movers} of {n_ions} ions give N_eff = {n_eff:.3g}, "
           f"an expected relative error on D of about {_pct(rsd)}")
    few = (movers <= th.few_movers and n_ions > th.few_movers and k > 0) or \
        (hops.fraction_ions_hopped < th.min_fraction_ions_moved and k > 0)
    if few and status == "pass":
        status = "warn"
    if few:
        why += (f"; the hops are carried by only {movers} ion(s) "
                f"({hops.fraction_ions_hopped:.0%} of them)")
        advice.append((40, f"Diffusion in this run is carried by {movers} of {n_ions} ions: "
                           "D rests on very few ions — check that they are not defects or "
                           "surface ions, and run longer or larger to involve more."))
    checks.append(CheckResult(
        "hops", "enough hops", status, float(n_eff), "effective hops",
        f"warn below {th.good_effective_hops:g}, fail below {th.min_effective_hops:g} "
        f"(and warn when ≤ {th.few_movers} ions or < {th.min_fraction_ions_moved:.0%} moved)",
        why + "."))

    # ---- extension advice from the effective-hop scaling
    extension = None
    target = th.target_relative_error
    if rsd > 1.05 * target:
        if target <= RSD_B:
            advice.append((20, f"A {_pct(target)} relative error on D cannot be reached by "
                               f"running longer: the error levels off at about {_pct(RSD_B)} "
                               "(calibrated floor); run several independent cells instead."))
        else:
            need = (RSD_A / (target - RSD_B)) ** 2
            if n_eff > 0 and k > 0:
                extension = t_run * (need / n_eff - 1.0)
                advice.append((20, f"Extend the run by about {extension:.3g} ps (to "
                                   f"{t_run + extension:.3g} ps in all) to reach a "
                                   f"{_pct(target)} relative error on D: that needs about "
                                   f"{need:.0f} effective hops, and this run gains "
                                   f"{n_eff / t_run:.3g} per ps."))
            else:
                extension = t_run * (need / n_up - 1.0)
                advice.append((20, f"No hop was seen in {t_run:g} ps: to reach a {_pct(target)} "
                                   f"relative error on D the run needs at least {extension:.3g} "
                                   f"ps more (the hop rate is below {n_up / t_run:.3g} per ps "
                                   f"at {th.confidence:.0%} confidence) — or a higher "
                                   "temperature."))

    # ---- 2. diffusive regime
    checks.append(_check_diffusive(curve, est, th, too_few))
    if checks[-1].status in ("warn", "fail"):
        advice.append((50, "The MSD is not yet a straight line in the fit window after removing "
                           "its offset: run longer, or set the fit window by hand past the "
                           "ballistic and cage regime."))

    # ---- 3. converged
    conv, first_half = _check_converged(traj, species, reference, method, est, th, too_few,
                                        check_halves, memory_budget_MB)
    checks.append(conv)
    running = None
    if check_halves and not too_few and math.isfinite(est.D_A2_per_ps) and not est.is_upper_bound:
        running = _running_estimate(traj, species, reference, method, est, first_half,
                                    memory_budget_MB)
    tick()
    if conv.status in ("warn", "fail"):
        advice.append((45, "D from the first and second halves of the run disagree beyond their "
                           "errors: the run is not converged — it may still be equilibrating or "
                           "changing; look at the start of the run and extend it."))

    # ---- 4. & 5. frames
    host_species = [s for s in traj.symbols if s != species]
    max_step = _max_step_all(traj, memory_budget_MB)
    frac_step = max_step / h_min
    st = _status(frac_step, th.step_fraction_warn, th.step_fraction_fail)
    checks.append(CheckResult(
        "unwrap_safe", "frames saved often enough to unwrap", st, float(frac_step),
        "of the smallest cell height",
        f"warn above {th.step_fraction_warn:g}, fail above {th.step_fraction_fail:g}",
        f"the largest move of any atom between saved frames is {max_step:.3g} Å, "
        f"{frac_step:.2g} of the smallest cell height ({h_min:.3g} Å)."))
    if st != "pass":
        advice.append((30, f"Save frames more often: an atom moved {max_step:.3g} Å between two "
                           f"saved frames, too close to half the cell ({0.5 * h_min:.3g} Å) to "
                           "unwrap without doubt."))
    counted = hops.hop_rate_per_ion_per_ps * dt
    implied = 0.0
    if not est.is_upper_bound and math.isfinite(est.D_A2_per_ps) and est.D_A2_per_ps > 0:
        implied = 6.0 * est.D_A2_per_ps * dt / (a * a)     # Γ_total dt from D = Γ a²/6
    per_frame = max(counted, implied)
    st = _status(per_frame, th.hops_per_frame_warn, th.hops_per_frame_fail)
    checks.append(CheckResult(
        "hops_resolved", "frames saved often enough to resolve hops", st, float(per_frame),
        "hops per ion per frame",
        f"warn above {th.hops_per_frame_warn:g}, fail above {th.hops_per_frame_fail:g}",
        f"an ion hops on average every {_every(per_frame)} saved frames of {dt:g} ps "
        f"({counted:.3g} hops per ion per frame counted, {implied:.3g} implied by D); "
        + (f"stays shorter than {hops.time_resolution_ps:.3g} ps are merged."
           if hops.time_resolution_ps > dt * (1 + 1e-9) else
           "a stay of one saved frame is counted; hops back and forth between two saved "
           "frames cannot be seen.")))
    if st != "pass":
        better_dt = dt * th.hops_per_frame_warn / per_frame
        advice.append((35, f"Save frames more often (every {better_dt:.2g} ps or less instead of "
                           f"{dt:g} ps): ions hop so often that several hops fall between saved "
                           "frames and the hop census undercounts."))

    # ---- 6. host stable
    host = _check_host(traj, host_species, th, memory_budget_MB)
    checks.append(host)
    tick()
    if host.status == "fail":
        advice.append((0, "THE HOST STRUCTURE IS NOT STABLE IN THIS RUN: " + host.explanation
                          + " It has melted or become amorphous at this temperature, so this D "
                          "does not describe the crystal, and extrapolating it to room "
                          "temperature is meaningless. Leave this temperature out."))
    elif host.status == "warn":
        advice.append((25, "The host atoms wander more than vibration explains: " +
                           host.explanation + " Check the structure for the start of melting or "
                           "amorphisation before using this temperature."))

    # ---- 7. & 8. equilibration and temperature
    eq, start_ps, T_kin, tcheck = _check_equilibrium(traj, th)
    tick()
    checks.append(eq)
    if eq.status in ("warn", "fail"):
        if start_ps is not None:
            advice.append((10, f"The start of the run is not equilibrated: discard the first "
                               f"{start_ps:.3g} ps (start_ps={start_ps:.3g}) and analyse the "
                               "rest."))
        else:
            advice.append((10, "Temperature or volume drifts through the whole run: it never "
                               "equilibrated — rerun with a longer equilibration."))
    checks.append(tcheck)
    if tcheck.status in ("warn", "fail"):
        advice.append((15, tcheck.explanation[0].upper() + tcheck.explanation[1:] +
                       " Check the thermostat settings and the temperature given for this run."))

    # ---- verdict
    statuses = [c.status for c in checks]
    verdict = VERDICTS[2] if "fail" in statuses else VERDICTS[1] if "warn" in statuses \
        else VERDICTS[0]
    if not advice:
        advice.append((90, f"All checks passed: {_fmt_D(est)}, expected relative error about "
                           f"{_pct(rsd)} from {n_eff:.3g} effective hops."))
    advice.sort(key=lambda p: p[0])
    failed = [c.name for c in checks if c.status == "fail"]
    warned = [c.name for c in checks if c.status == "warn"]
    msg = f"{verdict}: {_fmt_D(est)} from {k} hops (N_eff {n_eff:.3g})"
    if failed:
        msg += f"; failed: {', '.join(failed)}"
    if warned:
        msg += f"; to watch: {', '.join(warned)}"
    return RunAssessment(
        species=species, temperature_K=traj.temperature_K, duration_ps=t_run, n_ions=n_ions,
        verdict=verdict, checks=tuple(checks), advice=tuple(s for _, s in advice),
        diffusion=est, hops=hops, expected_relative_error=float(rsd), jump_distance_A=float(a),
        poisson_upper_hops=float(n_up), D_hop_bound_cm2_per_s=D_bound_cm2,
        suggested_extension_ps=None if extension is None else float(extension),
        suggested_start_ps=start_ps, kinetic_temperature_K=T_kin, thresholds=th,
        message=msg + ".", msd_curve=curve, running=running)


def _thresholds(thresholds):
    if thresholds is None:
        return TrustThresholds()
    if isinstance(thresholds, TrustThresholds):
        return thresholds
    if isinstance(thresholds, dict):
        names = {f.name for f in dataclasses.fields(TrustThresholds)}
        unknown = sorted(set(thresholds) - names)
        if unknown:
            raise UsageError(f"unknown threshold(s) {', '.join(unknown)}; known: "
                             f"{', '.join(sorted(names))}")
        return TrustThresholds(**thresholds)
    raise UsageError(f"thresholds must be a TrustThresholds or a dict, got "
                     f"{type(thresholds).__name__}")


def _pct(x):
    return "n/a" if not math.isfinite(x) else f"{100 * x:.2g}%"


def _every(per_frame):
    return "∞" if per_frame <= 0 else f"{1.0 / per_frame:.3g}"


def _max_step_all(traj, memory_budget_MB):
    """Largest displacement of any atom between consecutive saved frames, Å."""
    best = 0.0
    for _, pos in traj.iter_atom_blocks(memory_budget_MB=memory_budget_MB):
        d = np.diff(pos, axis=0)
        if d.size:
            best = max(best, float(np.sqrt(np.einsum("tki,tki->tk", d, d).max())))
    return best


def _check_diffusive(curve, est, th, too_few):
    title = "diffusive regime reached in the fit window"
    thr = f"|slope − 1| warn above {th.linearity_warn:g}, fail above {th.linearity_fail:g}"
    if too_few or est.is_upper_bound:
        return CheckResult("diffusive", title, "skipped", math.nan, "log–log slope", thr,
                           "not judged: with too few hops there is no diffusive regime to see.")
    if not math.isfinite(est.D_A2_per_ps):
        return CheckResult("diffusive", title, "fail", math.nan, "log–log slope", thr,
                           est.message or "no fit window with a linear MSD was found.")
    t0, t1 = est.fit_window_ps
    lag = curve.lag_ps
    sel = np.flatnonzero((lag >= t0 * (1 - 1e-9)) & (lag <= t1 * (1 + 1e-9)) & (lag > 0))
    if len(sel) > 60:
        sel = np.unique(sel[np.round(np.geomspace(1, len(sel), 60)).astype(int) - 1])
    y = curve.msd_A2[sel] - est.offset_A2
    ok = y > 0
    if ok.sum() < 3:
        return CheckResult("diffusive", title, "fail", math.nan, "log–log slope", thr,
                           "the MSD minus its offset is not positive in the fit window.")
    slope = float(np.polyfit(np.log(lag[sel][ok]), np.log(y[ok]), 1)[0])
    st = _status(abs(slope - 1.0), th.linearity_warn, th.linearity_fail)
    return CheckResult("diffusive", title, st, slope, "log–log slope", thr,
                       f"in the fit window {t0:.3g}–{t1:.3g} ps the MSD minus its offset "
                       f"({est.offset_A2:.3g} Å²) grows as t^{slope:.3g} (diffusive: t^1).")


def _normal_equivalent(t, s1, dof1, s2, dof2):
    """The normal deviate with the same two-sided p-value as a Welch t statistic.

    Each half's error bar rests on few ions (Student t with ``dof`` degrees of
    freedom), so the raw difference over its standard error has heavier tails
    than a normal deviate; converting keeps the check's false-alarm rate at the
    level its σ thresholds promise (Welch–Satterthwaite degrees of freedom).
    """
    from scipy import stats

    if not math.isfinite(t):
        return t
    v1, v2 = s1 * s1, s2 * s2
    terms = [v * v / d for v, d in ((v1, dof1), (v2, dof2)) if math.isfinite(d) and d > 0]
    if len(terms) < 2 or (v1 + v2) == 0:
        return t
    nu = (v1 + v2) ** 2 / sum(terms)
    return float(stats.norm.isf(stats.t.sf(t, nu)))


def _check_converged(traj, species, reference, method, est, th, too_few, enabled, budget):
    title = "converged: both halves give the same D"
    thr = f"warn above {th.convergence_warn_z:g}, fail above {th.convergence_fail_z:g} σ"
    if not enabled:
        return CheckResult("converged", title, "skipped", math.nan, "σ", thr,
                           "not run (check_halves=False)."), None
    if too_few or not math.isfinite(est.D_A2_per_ps) or est.is_upper_bound:
        return CheckResult("converged", title, "skipped", math.nan, "σ", thr,
                           "not judged: the whole run gives no fitted D."), None
    half = 0.5 * traj.duration_ps
    parts = []
    for lo, hi in ((0.0, half), (half, traj.duration_ps)):
        sub = traj.window(lo, hi)
        if sub.n_frames < 8:
            parts.append(None)
            continue
        e = estimate_diffusion(compute_msd(sub, species, reference=reference,
                                           memory_budget_MB=budget), method=method)
        parts.append(e if (math.isfinite(e.D_A2_per_ps) and not e.is_upper_bound) else None)
    if any(p is None for p in parts):
        return CheckResult("converged", title, "warn", math.nan, "σ", thr,
                           "a half of the run is too short or has too few hops to give D "
                           "on its own."), parts[0]
    d1, d2 = parts
    se = math.hypot(d1.D_stderr_cm2_per_s, d2.D_stderr_cm2_per_s)
    t = abs(d1.D_cm2_per_s - d2.D_cm2_per_s) / se if se > 0 else math.inf
    z = _normal_equivalent(t, d1.D_stderr_cm2_per_s, d1.dof, d2.D_stderr_cm2_per_s, d2.dof)
    st = _status(z, th.convergence_warn_z, th.convergence_fail_z)
    return CheckResult("converged", title, st, float(z), "σ", thr,
                       f"D is {d1.D_cm2_per_s:.3g} ± {d1.D_stderr_cm2_per_s:.2g} cm²/s in the "
                       f"first half and {d2.D_cm2_per_s:.3g} ± {d2.D_stderr_cm2_per_s:.2g} cm²/s "
                       f"in the second, {t:.2g} standard errors apart ({z:.2g} σ as a normal "
                       f"deviate, allowing for the few ions behind each error bar)."), d1


def _running_estimate(traj, species, reference, method, est, first_half, budget):
    """D from the first quarter, half, three quarters and all of the run (convergence figure)."""
    times, D, lo, hi = [], [], [], []
    for frac in (0.25, 0.5, 0.75, 1.0):
        if frac == 1.0:
            e = est
        elif frac == 0.5:
            e = first_half
        else:
            sub = traj.window(0.0, frac * traj.duration_ps)
            e = None
            if sub.n_frames >= 8:
                e = estimate_diffusion(compute_msd(sub, species, reference=reference,
                                                   memory_budget_MB=budget), method=method)
        ok = e is not None and math.isfinite(e.D_A2_per_ps) and not e.is_upper_bound
        times.append(frac * traj.duration_ps)
        D.append(e.D_cm2_per_s if ok else math.nan)
        lo.append(e.D_interval95_cm2_per_s[0] if ok else math.nan)
        hi.append(e.D_interval95_cm2_per_s[1] if ok else math.nan)
    return RunningEstimate(tuple(times), tuple(D), tuple(lo), tuple(hi))


def _host_msd_at(traj, host_species, lags, budget):
    """MSD of each host species at a few lags, about the host's own centre of mass.

    Returns dict of symbol to (len(lags),) float, Å² (all time origins, all atoms).
    """
    masses = np.array([traj.species_mass(s) for s in host_species])
    track = sum(m * traj.com_tracks[s] for m, s in zip(masses, host_species)) / masses.sum()
    track = track - track[:1]
    out = {}
    for s in host_species:
        acc = np.zeros(len(lags))
        n_atoms = 0
        for _, pos in traj.iter_atom_blocks(s, memory_budget_MB=budget):
            pos = pos - track[:, None, :]
            for j, m in enumerate(lags):
                d = pos[m:] - pos[:-m]
                acc[j] += np.einsum("tki,tki->", d, d) / d.shape[0]
            n_atoms += pos.shape[1]
        out[s] = acc / n_atoms
    return out


def _check_host(traj, host_species, th, budget):
    title = "host structure stable (other species' MSD plateaus)"
    thr = (f"growth of the MSD from a quarter to half the run: warn above "
           f"{th.host_growth_warn_A2:g} Å², fail above {th.host_growth_fail_A2:g} Å²")
    if not host_species:
        return CheckResult("host_stable", title, "skipped", math.nan, "Å²", thr,
                           "no other species in the run.")
    m_end = max(1, (traj.n_frames - 1) // 2)
    m_mid = max(1, m_end // 2)
    if m_end == m_mid:
        return CheckResult("host_stable", title, "skipped", math.nan, "Å²", thr,
                           "the run is too short to see whether the host MSD levels off.")
    msd = _host_msd_at(traj, host_species, (m_mid, m_end), budget)
    growth = {s: float(v[1] - v[0]) for s, v in msd.items()}
    s = max(growth, key=growth.get)
    g = growth[s]
    dt = traj.frame_interval_ps
    t_a, t_b = m_mid * dt, m_end * dt
    st = _status(g, th.host_growth_warn_A2, th.host_growth_fail_A2)
    if st == "pass":
        text = (f"the MSD of every host species levels off: {s}'s grows by only {g:.3g} Å² "
                f"from {t_a:.3g} to {t_b:.3g} ps, as vibration alone does.")
    else:
        text = (f"the MSD of the {s} atoms keeps growing — by {g:.3g} Å² between lags of "
                f"{t_a:.3g} and {t_b:.3g} ps, to {msd[s][1]:.3g} Å² — so they leave their "
                "sites.")
    return CheckResult("host_stable", title, st, g, "Å²", thr, text)


def _check_equilibrium(traj, th):
    """Drift of temperature (from velocities) and volume; suggested start; kinetic T check."""
    title = "equilibrated: no drift of temperature or volume"
    thr = (f"relative departure from the steady value: warn above {th.drift_warn:g}, fail above "
           f"{th.drift_fail:g} (when also beyond {th.drift_z:g} × the noise)")
    t = np.asarray(traj.times_ps, float)
    series = {}
    V = traj.volumes_A3
    if np.ptp(V) > 1e-9 * np.mean(V):
        series["volume"] = V
    T_series = None
    if traj.has_velocities:
        T_series = kinetic_temperature_K(traj.velocities, traj.masses)
        series["temperature"] = T_series
    tcheck_title = "kinetic temperature matches the nominal one"
    tthr = (f"relative mismatch: warn above {th.temperature_warn:g}, fail above "
            f"{th.temperature_fail:g}")
    if not series:
        eq = CheckResult("equilibrated", title, "skipped", math.nan, "relative departure", thr,
                         "constant volume and no velocities in the file: nothing to check.")
        tcheck = CheckResult("temperature", tcheck_title, "skipped", math.nan, "relative", tthr,
                             "no velocities in the file.")
        return eq, None, None, tcheck

    worst, name, start = 0.0, "", 0
    for key, x in series.items():
        dev, st_i = _settling(x, t, th.drift_warn, th.drift_z)
        if st_i is None:                      # still drifting in the second half
            worst, name, start = dev, key, None
            break
        if dev > worst:
            worst, name = dev, key
        start = max(start, st_i)
    st = _status(worst, th.drift_warn, th.drift_fail)
    if start is None:
        st = "fail"
    start_ps = None if (start is None or start == 0) else float(t[start] - t[0])
    if st == "pass" and start_ps is None:
        what = " and ".join(series)
        text = (f"the {what} stays within {th.drift_warn:.0%} of its steady value "
                "through the run.")
    elif start is None:
        text = (f"the {name} still drifts in the second half of the run: it never reached a "
                "steady state.")
    else:
        text = (f"at the start the {name} is up to {100 * worst:.2g}% away from its steady "
                f"value; from {start_ps:.3g} ps on it is steady.")
    eq = CheckResult("equilibrated", title, st, float(worst), "relative departure", thr, text)

    T_kin = None
    if T_series is None:
        tcheck = CheckResult("temperature", tcheck_title, "skipped", math.nan, "relative", tthr,
                             "no velocities in the file.")
    else:
        s = 0 if start_ps is None else int(np.searchsorted(t - t[0], start_ps))
        T_kin = float(np.mean(T_series[s:]))
        if traj.temperature_K is None:
            tcheck = CheckResult("temperature", tcheck_title, "skipped", math.nan, "relative",
                                 tthr, f"kinetic temperature {T_kin:.4g} K; no nominal "
                                       "temperature was given to compare with.")
        else:
            rel = abs(T_kin / traj.temperature_K - 1.0)
            st_t = _status(rel, th.temperature_warn, th.temperature_fail)
            tcheck = CheckResult("temperature", tcheck_title, st_t, float(rel), "relative", tthr,
                                 f"the kinetic temperature from the velocities is {T_kin:.4g} K "
                                 f"against a nominal {traj.temperature_K:.4g} K "
                                 f"({100 * (T_kin / traj.temperature_K - 1):+.2g}%).")
    return eq, start_ps, T_kin, tcheck
