"""Ionic conductivity from diffusivities: Nernst–Einstein, Haven ratio, screening tiers.

Formulas (``../shared/REFERENCES.md``, Conductivity; docs/methods):

* tracer route: σ = N q² D* / (V k_B T H_R), H_R the Haven ratio (default 1, always
  recorded);
* collective route: σ = N q² D_σ / (V k_B T), no Haven ratio, with
  D_σ = lim ⟨|Σ_i Δr_i(t)|²⟩ / (2 d N t);
* several mobile species together: σ = lim ⟨|Σ_i q_i Δr_i(t)|²⟩ / (2 d V k_B T t), from
  the slope of the charge-weighted MSD.

N is the number of mobile ions in the cell, V the cell volume, q = z e. Constants
come from :mod:`diffkit.units` (scipy.constants, CODATA). σ is in S/cm and also
given in mS/cm.

σ at a target temperature (300 K by default) comes from an Arrhenius fit
(:mod:`diffkit.arrhenius`) either of ln D (then Nernst–Einstein at the target, with a
volume the caller chooses: see :func:`volume_at`) or of ln(σT) built from σ at each
simulated temperature (each with its own volume). Because ln σ = ln D + constant,
the σ band is the D band times the Nernst–Einstein factor (delta method in ln space,
exact for a line).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np
from scipy import stats as _stats

from .arrhenius import (_SUSPICIOUS_D_CM2_PER_S, ArrheniusFit, _as_1d, _check_bounds,
                        _check_inputs, fit_arrhenius)
from ._checks import positive_number
from .errors import DiffkitWarning, FitError, InputError, UsageError
from .units import (A2_PER_PS_IN_CM2_PER_S, A3_IN_CM3, E_CHARGE_C, K_B_J_PER_K, MS_PER_S,
                    a2ps_to_cm2s)
from .results import to_plain

__all__ = [
    "Conductivity",
    "ExtrapolatedConductivity",
    "VolumeChoice",
    "ConductivityTiers",
    "CandidateSummary",
    "UNRESOLVED_TIER",
    "CAUTIONS",
    "default_charge",
    "nernst_einstein",
    "nernst_einstein_from_internal",
    "collective_conductivity",
    "sigma_from_charge_msd_slope",
    "fit_arrhenius_sigma_T",
    "extrapolate_conductivity",
    "volume_at",
    "summarize_candidate",
]

# S -> mS: the SI prefix milli, exact by definition.
_MS_PER_S = MS_PER_S

#: Default charges (elementary charges) of common mobile cations.
_DEFAULT_CHARGES = {
    **{s: 1 for s in ("Li", "Na", "K", "Rb", "Cs", "Fr")},  # alkali metals
    **{s: 2 for s in ("Be", "Mg", "Ca", "Sr", "Ba", "Ra")},  # alkaline-earth metals
    "Zn": 2,
}

#: Tier name used when the 95% band spans more than one tier.
UNRESOLVED_TIER = "unresolved"

#: Plain sentences every candidate summary carries.
CAUTIONS = (
    "Computed values are screening estimates; they defer to measurement.",
    "Extrapolation to the target temperature assumes one conduction mechanism and no phase "
    "change between the simulated temperatures and the target.",
    "Making and handling candidate materials (many are air- or moisture-sensitive, some "
    "release toxic gases) follows local safety rules and licensed practice.",
)


# --------------------------------------------------------------------------- helpers




def _charge(value):
    try:
        z = float(value)
    except (TypeError, ValueError) as exc:
        raise InputError(f"charge: expected a number of elementary charges, got {value!r}") from exc
    if not math.isfinite(z) or z == 0:
        raise InputError(f"charge: expected a non-zero number of elementary charges, got {value!r}")
    return int(z) if z == int(z) else z


def _n_ions(value):
    v = positive_number("n_ions", value)
    return int(v) if v == int(v) else v


def _ne_factor(n_ions, volume_A3, temperature_K, charge):
    """N q² / (V k_B T) in S/cm per cm²/s."""
    q = charge * E_CHARGE_C
    return n_ions * q * q / (volume_A3 * A3_IN_CM3 * K_B_J_PER_K * temperature_K)


def default_charge(symbol):
    """The default charge of a mobile ion, in elementary charges.

    +1 for the alkali metals (Li, Na, K, Rb, Cs, Fr), +2 for the alkaline-earth metals
    (Be, Mg, Ca, Sr, Ba, Ra) and Zn. Anything else must be given by the user.

    Parameters
    ----------
    symbol : str
        Element symbol, case-insensitive (``"Li"``, ``"li"``).

    Returns
    -------
    int

    Raises
    ------
    InputError
        For any other species, saying how to give the charge.
    """
    text = str(symbol).strip()
    key = text[:1].upper() + text[1:].lower()
    if key not in _DEFAULT_CHARGES:
        raise InputError(
            f"no default charge for mobile species {symbol!r}: defaults exist only for alkali "
            "ions (+1), alkaline-earth ions and Zn (+2); give the charge explicitly, "
            "e.g. charge=-1")
    return _DEFAULT_CHARGES[key]


# --------------------------------------------------------------------------- results


@dataclass(frozen=True, eq=False)
class Conductivity:
    """σ at one simulated temperature.

    Attributes
    ----------
    sigma_S_per_cm, sigma_mS_per_cm : float
    sigma_stderr_S_per_cm, sigma_stderr_mS_per_cm : float or None
        Propagated from the diffusivity's (or slope's) error where given (σ ∝ D).
    temperature_K : float
    route : str
        ``"tracer D"``, ``"collective D"`` or ``"charge-weighted MSD"``.
    haven_ratio : float or None
        H_R used (tracer route only; None where no Haven ratio enters).
    charge : float or None
        z of the mobile ion (None for the charge-weighted route, where charges are in the slope).
    n_ions : float or None
        Mobile ions in the cell.
    volume_A3 : float
        Cell volume used, Å³.
    number_density_per_cm3 : float or None
    D_cm2_per_s, D_stderr_cm2_per_s : float or None
        The diffusivity used (tracer or collective, per ``route``).
    formula : str
    """

    sigma_S_per_cm: float
    sigma_stderr_S_per_cm: object
    sigma_mS_per_cm: float
    sigma_stderr_mS_per_cm: object
    temperature_K: float
    route: str
    haven_ratio: object
    charge: object
    n_ions: object
    volume_A3: float
    number_density_per_cm3: object
    D_cm2_per_s: object
    D_stderr_cm2_per_s: object
    formula: str

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)

    def __repr__(self):
        err = ("" if self.sigma_stderr_S_per_cm is None
               else f" ± {self.sigma_stderr_S_per_cm:.2g}")
        hr = "" if self.haven_ratio is None else f", Haven ratio {self.haven_ratio:g}"
        return (f"Conductivity({self.sigma_S_per_cm:.4g}{err} S/cm "
                f"= {self.sigma_mS_per_cm:.4g} mS/cm at {self.temperature_K:g} K, "
                f"{self.route}{hr})")


@dataclass(frozen=True, eq=False)
class ExtrapolatedConductivity:
    """σ at a target temperature from an Arrhenius fit, with its bands.

    Attributes
    ----------
    temperature_K : float
    sigma_S_per_cm, sigma_mS_per_cm : float
    sigma_interval95_S_per_cm, sigma_interval95_mS_per_cm : (float, float)
        95% confidence band of the fitted line carried to σ.
    sigma_prediction_interval95_S_per_cm : (float, float)
        95% prediction interval (see :class:`diffkit.arrhenius.ArrheniusPoint`).
    ln_sigma_stderr : float
        Standard error of ln σ (equal to that of ln D or ln σT at this temperature).
    statistics : str
        The fit's statistics rule.
    route : str
        ``"tracer D via Arrhenius fit of ln D"`` or ``"Arrhenius fit of ln(sigma*T)"``.
    haven_ratio, charge, n_ions, volume_A3 : float or None
    volume_note : str
        Which volume was used and why.
    extrapolation_caution : str
    """

    temperature_K: float
    sigma_S_per_cm: float
    sigma_interval95_S_per_cm: tuple
    sigma_prediction_interval95_S_per_cm: tuple
    sigma_mS_per_cm: float
    sigma_interval95_mS_per_cm: tuple
    ln_sigma_stderr: float
    statistics: str
    route: str
    haven_ratio: object
    charge: object
    n_ions: object
    volume_A3: object
    volume_note: str
    extrapolation_caution: str

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)

    def __repr__(self):
        lo, hi = self.sigma_interval95_mS_per_cm
        return (f"ExtrapolatedConductivity(sigma({self.temperature_K:g} K) = "
                f"{self.sigma_mS_per_cm:.3g} mS/cm, 95% band [{lo:.3g}, {hi:.3g}] mS/cm, "
                f"{self.route})")


@dataclass(frozen=True, eq=False)
class VolumeChoice:
    """The cell volume chosen for a target temperature.

    Attributes
    ----------
    volume_A3 : float
    temperature_K : float
        The temperature it is meant for.
    method : str
        ``"lowest"``, ``"linear"`` or ``"given"``.
    description : str
        One sentence saying which volume this is.
    """

    volume_A3: float
    temperature_K: float
    method: str
    description: str

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)

    def __repr__(self):
        return f"VolumeChoice({self.volume_A3:.6g} Å³ at {self.temperature_K:g} K, {self.method})"


@dataclass(frozen=True)
class ConductivityTiers:
    """Screening tiers by σ at the target temperature.

    Defaults (``../shared/REFERENCES.md``, Conductivity; user-changeable): most Li
    solids are below 1e-4 S/cm, and ≥ 1 mS/cm (1e-3 S/cm) is the usual practical
    target, so the tiers are "slow" (< 1e-4 S/cm), "moderate" (1e-4 to 1e-3 S/cm)
    and "fast" (≥ 1e-3 S/cm). A value on a boundary belongs to the higher tier.

    Attributes
    ----------
    boundaries_S_per_cm : tuple of float, increasing
    names : tuple of str, one more than boundaries, slowest first
    """

    boundaries_S_per_cm: tuple = (1e-4, 1e-3)
    names: tuple = ("slow", "moderate", "fast")

    def __post_init__(self):
        b = tuple(float(v) for v in self.boundaries_S_per_cm)
        names = tuple(str(n) for n in self.names)
        if len(b) == 0 or any(not math.isfinite(v) or v <= 0 for v in b):
            raise UsageError(f"tier boundaries must be positive S/cm values, got {self.boundaries_S_per_cm!r}")
        if any(b[i] >= b[i + 1] for i in range(len(b) - 1)):
            raise UsageError(f"tier boundaries must increase, got {self.boundaries_S_per_cm!r}")
        if len(names) != len(b) + 1:
            raise UsageError(f"{len(b)} tier boundaries need {len(b) + 1} names, got {names!r}")
        if UNRESOLVED_TIER in names or len(set(names)) != len(names):
            raise UsageError(f"tier names must be distinct and not {UNRESOLVED_TIER!r}, got {names!r}")
        object.__setattr__(self, "boundaries_S_per_cm", b)
        object.__setattr__(self, "names", names)

    def tier_of(self, sigma_S_per_cm):
        """The tier holding one value of σ (S/cm)."""
        return self.names[int(np.searchsorted(self.boundaries_S_per_cm, sigma_S_per_cm,
                                              side="right"))]

    def classify(self, lower_S_per_cm, upper_S_per_cm, *, is_upper_bound=False):
        """Tier of a 95% band, or :data:`UNRESOLVED_TIER` when it spans more than one.

        For an upper bound (``is_upper_bound=True``, the band is [0, bound]): the
        lowest tier when the bound is below the lowest boundary, else unresolved.
        """
        if is_upper_bound:
            return self.names[0] if upper_S_per_cm < self.boundaries_S_per_cm[0] else UNRESOLVED_TIER
        lo, hi = self.tier_of(lower_S_per_cm), self.tier_of(upper_S_per_cm)
        return lo if lo == hi else UNRESOLVED_TIER

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)


@dataclass(frozen=True, eq=False)
class CandidateSummary:
    """Everything screening needs about one candidate.

    Attributes
    ----------
    name : str
    route : str
        ``"tracer_D"`` (Arrhenius fit of ln D, Nernst–Einstein at the target) or
        ``"sigma_T"`` (Nernst–Einstein at each temperature, Arrhenius fit of ln σT).
    route_description : str
    target_temperature_K : float
    Ea_eV, Ea_stderr_eV : float or None
    Ea_interval95_eV : (float, float) or None
    sigma_target_S_per_cm, sigma_target_mS_per_cm : float or None
        σ at the target temperature (the bound itself when ``sigma_target_is_upper_bound``).
    sigma_target_interval95_S_per_cm, sigma_target_interval95_mS_per_cm : (float, float) or None
    sigma_target_is_upper_bound : bool
    tier : str
    tiers : ConductivityTiers
    haven_ratio : float
    charge : float
    n_ions : float
    volume_A3 : float or None
        Volume used at the target (tracer route); None for the σT route.
    volume_note : str
    statistics : str or None
    fit : ArrheniusFit or None
    sigma_at_temperatures : tuple of Conductivity
        Tracer-route σ at every simulated temperature with a value.
    sigma_collective_at_temperatures : tuple of Conductivity
        Collective-route σ where collective diffusivities were given.
    flags, messages, cautions : tuple of str
    """

    name: str
    route: str
    route_description: str
    target_temperature_K: float
    Ea_eV: object
    Ea_stderr_eV: object
    Ea_interval95_eV: object
    sigma_target_S_per_cm: object
    sigma_target_interval95_S_per_cm: object
    sigma_target_mS_per_cm: object
    sigma_target_interval95_mS_per_cm: object
    sigma_target_is_upper_bound: bool
    tier: str
    tiers: ConductivityTiers
    haven_ratio: float
    charge: float
    n_ions: float
    volume_A3: object
    volume_note: str
    statistics: object
    fit: object
    sigma_at_temperatures: tuple
    sigma_collective_at_temperatures: tuple = ()
    flags: tuple = ()
    messages: tuple = ()
    cautions: tuple = field(default=CAUTIONS)

    def to_dict(self):
        """JSON-ready dict (the fit and per-temperature results nested)."""
        return to_plain(self)

    def __repr__(self):
        if self.sigma_target_S_per_cm is None:
            sig = "no value"
        elif self.sigma_target_is_upper_bound:
            sig = f"≤ {self.sigma_target_mS_per_cm:.3g} mS/cm"
        else:
            lo, hi = self.sigma_target_interval95_mS_per_cm
            sig = f"{self.sigma_target_mS_per_cm:.3g} mS/cm [{lo:.3g}, {hi:.3g}]"
        ea = "n/a" if self.Ea_eV is None else f"{self.Ea_eV:.3g} ± {self.Ea_stderr_eV:.2g} eV"
        flags = ", ".join(self.flags) if self.flags else "none"
        return (f"CandidateSummary({self.name!r}: Ea = {ea}, "
                f"sigma({self.target_temperature_K:g} K) = {sig}, tier {self.tier!r}, "
                f"Haven ratio {self.haven_ratio:g}; flags: {flags})")


# --------------------------------------------------------------------------- σ at one T


def _from_D(D, D_se, *, n_ions, volume_A3, temperature_K, charge, haven_ratio, route, formula):
    n = _n_ions(n_ions)
    V = positive_number("volume_A3", volume_A3)
    T = positive_number("temperature_K", temperature_K)
    z = _charge(charge)
    factor = _ne_factor(n, V, T, z)
    if haven_ratio is not None:
        factor /= positive_number("haven_ratio", haven_ratio)
    sigma = factor * D
    se = None if D_se is None else factor * D_se
    return Conductivity(
        sigma_S_per_cm=sigma,
        sigma_stderr_S_per_cm=se,
        sigma_mS_per_cm=sigma * _MS_PER_S,
        sigma_stderr_mS_per_cm=None if se is None else se * _MS_PER_S,
        temperature_K=T,
        route=route,
        haven_ratio=None if haven_ratio is None else float(haven_ratio),
        charge=z,
        n_ions=n,
        volume_A3=V,
        number_density_per_cm3=n / (V * A3_IN_CM3),
        D_cm2_per_s=D,
        D_stderr_cm2_per_s=D_se,
        formula=formula,
    )


def _diffusivity(D_cm2_per_s, D_A2_per_ps, D_stderr_cm2_per_s, D_stderr_A2_per_ps, name="D"):
    if (D_cm2_per_s is None) == (D_A2_per_ps is None):
        raise UsageError(f"give exactly one of {name}_cm2_per_s and {name}_A2_per_ps")
    if D_stderr_cm2_per_s is not None and D_stderr_A2_per_ps is not None:
        raise UsageError(f"give at most one of {name}_stderr_cm2_per_s and {name}_stderr_A2_per_ps")
    if D_cm2_per_s is None:
        D = a2ps_to_cm2s(positive_number(f"{name}_A2_per_ps", D_A2_per_ps, allow_zero=True))
    else:
        D = positive_number(f"{name}_cm2_per_s", D_cm2_per_s, allow_zero=True)
        if D > _SUSPICIOUS_D_CM2_PER_S:
            warnings.warn(
                f"{name}_cm2_per_s = {D:.3g} is far above diffusivities in solids; it looks like "
                f"a value in Å²/ps (1 Å²/ps = {A2_PER_PS_IN_CM2_PER_S:g} cm²/s): pass it as "
                f"{name}_A2_per_ps if so.", DiffkitWarning, stacklevel=3)
    se = None
    if D_stderr_cm2_per_s is not None:
        se = positive_number(f"{name}_stderr_cm2_per_s", D_stderr_cm2_per_s, allow_zero=True)
    elif D_stderr_A2_per_ps is not None:
        se = a2ps_to_cm2s(positive_number(f"{name}_stderr_A2_per_ps", D_stderr_A2_per_ps, allow_zero=True))
    return D, se


def nernst_einstein(D_cm2_per_s=None, *, n_ions, volume_A3, temperature_K, charge=1,
                    haven_ratio=1.0, D_stderr_cm2_per_s=None, D_A2_per_ps=None,
                    D_stderr_A2_per_ps=None):
    """Conductivity from the tracer diffusivity: σ = N q² D / (V k_B T H_R).

    Parameters
    ----------
    D_cm2_per_s : float, cm²/s
        Tracer diffusivity D* (or give ``D_A2_per_ps`` instead).
    n_ions : int
        Number N of mobile ions in the cell.
    volume_A3 : float, Å³
        Cell volume V (the run's mean volume at this temperature).
    temperature_K : float, K
    charge : float
        z in elementary charges (q = z e); see :func:`default_charge`.
    haven_ratio : float
        H_R = D*/D_σ, default 1; recorded in the result.
    D_stderr_cm2_per_s, D_stderr_A2_per_ps : float, optional
        Standard error of D, carried to σ.
    D_A2_per_ps : float, Å²/ps, optional
        D in internal units instead of cm²/s.

    Returns
    -------
    Conductivity
    """
    D, se = _diffusivity(D_cm2_per_s, D_A2_per_ps, D_stderr_cm2_per_s, D_stderr_A2_per_ps)
    return _from_D(D, se, n_ions=n_ions, volume_A3=volume_A3, temperature_K=temperature_K,
                   charge=charge, haven_ratio=haven_ratio, route="tracer D",
                   formula="sigma = N q^2 D / (V k_B T H_R)")


def nernst_einstein_from_internal(D_A2_per_ps, n_ions, volume_A3, temperature_K, *, charge=1,
                                  haven_ratio=1.0, D_stderr_A2_per_ps=None):
    """:func:`nernst_einstein` with D in Å²/ps (internal units), V in Å³ and an ion count."""
    return nernst_einstein(D_A2_per_ps=D_A2_per_ps, D_stderr_A2_per_ps=D_stderr_A2_per_ps,
                           n_ions=n_ions, volume_A3=volume_A3, temperature_K=temperature_K,
                           charge=charge, haven_ratio=haven_ratio)


def collective_conductivity(D_sigma_cm2_per_s=None, *, n_ions, volume_A3, temperature_K, charge=1,
                            D_sigma_stderr_cm2_per_s=None, D_sigma_A2_per_ps=None,
                            D_sigma_stderr_A2_per_ps=None):
    """Conductivity from the collective (charge) diffusivity: σ = N q² D_σ / (V k_B T).

    No Haven ratio enters. D_σ = lim ⟨|Σ_i Δr_i(t)|²⟩ / (2 d N t) over the N mobile ions
    of one species (the ``collective`` MSD of :mod:`diffkit.msd` divided by 2 d t).

    Parameters
    ----------
    D_sigma_cm2_per_s : float, cm²/s (or ``D_sigma_A2_per_ps``, Å²/ps)
    n_ions : int
    volume_A3 : float, Å³
    temperature_K : float, K
    charge : float
    D_sigma_stderr_cm2_per_s, D_sigma_stderr_A2_per_ps : float, optional

    Returns
    -------
    Conductivity
        ``route="collective D"``, ``haven_ratio=None``.
    """
    D, se = _diffusivity(D_sigma_cm2_per_s, D_sigma_A2_per_ps, D_sigma_stderr_cm2_per_s,
                         D_sigma_stderr_A2_per_ps, name="D_sigma")
    return _from_D(D, se, n_ions=n_ions, volume_A3=volume_A3, temperature_K=temperature_K,
                   charge=charge, haven_ratio=None, route="collective D",
                   formula="sigma = N q^2 D_sigma / (V k_B T)")


def sigma_from_charge_msd_slope(slope_e2_A2_per_ps, *, volume_A3, temperature_K, dimensions=3,
                                slope_stderr_e2_A2_per_ps=None):
    """Conductivity of all mobile species together from the charge-weighted MSD.

    σ = s / (2 d V k_B T), with s the long-time slope of ⟨|Σ_i q_i Δr_i(t)|²⟩ against t.

    Parameters
    ----------
    slope_e2_A2_per_ps : float, e²·Å²/ps
        Slope of the charge-weighted MSD (charges in elementary charges).
    volume_A3 : float, Å³
    temperature_K : float, K
    dimensions : int
        d, the number of dimensions the MSD sums over (3 for the full MSD).
    slope_stderr_e2_A2_per_ps : float, optional

    Returns
    -------
    Conductivity
        ``route="charge-weighted MSD"``; no Haven ratio, charge or ion count.
    """
    s = positive_number("slope_e2_A2_per_ps", slope_e2_A2_per_ps, allow_zero=True)
    V = positive_number("volume_A3", volume_A3)
    T = positive_number("temperature_K", temperature_K)
    if dimensions not in (1, 2, 3):
        raise InputError(f"dimensions: expected 1, 2 or 3, got {dimensions!r}")
    factor = (E_CHARGE_C ** 2 * A2_PER_PS_IN_CM2_PER_S
              / (2 * dimensions * V * A3_IN_CM3 * K_B_J_PER_K * T))
    sigma = factor * s
    se = None
    if slope_stderr_e2_A2_per_ps is not None:
        se = factor * positive_number("slope_stderr_e2_A2_per_ps", slope_stderr_e2_A2_per_ps,
                                allow_zero=True)
    return Conductivity(
        sigma_S_per_cm=sigma, sigma_stderr_S_per_cm=se, sigma_mS_per_cm=sigma * _MS_PER_S,
        sigma_stderr_mS_per_cm=None if se is None else se * _MS_PER_S, temperature_K=T,
        route="charge-weighted MSD", haven_ratio=None, charge=None, n_ions=None, volume_A3=V,
        number_density_per_cm3=None, D_cm2_per_s=None, D_stderr_cm2_per_s=None,
        formula="sigma = slope<|sum_i q_i dr_i|^2> / (2 d V k_B T)")


# --------------------------------------------------------------------------- volume, fits


def volume_at(T_K, temperatures_K, volumes_A3, method="lowest"):
    """Choose the cell volume for a target temperature from the simulated ones.

    Parameters
    ----------
    T_K : float, K
        Target temperature.
    temperatures_K : (n,) float, K
        Simulated temperatures.
    volumes_A3 : (n,) float, Å³
        Mean cell volume ⟨V⟩ of each run.
    method : {"lowest", "linear"}
        ``"lowest"``: the mean volume of the lowest simulated temperature (the
        default; simplest, slightly too large a volume for a target below it).
        ``"linear"``: a least-squares line of ⟨V⟩ against T evaluated at ``T_K``.

    Returns
    -------
    VolumeChoice
    """
    T0 = positive_number("T_K", T_K)
    T = _as_1d("temperatures_K", temperatures_K)
    V = _as_1d("volumes_A3", volumes_A3)
    if len(T) != len(V) or len(T) == 0:
        raise InputError(f"temperatures_K and volumes_A3 must be non-empty and of equal length; "
                         f"got {len(T)} and {len(V)}")
    for i in range(len(T)):
        if not (math.isfinite(T[i]) and T[i] > 0):
            raise InputError(f"temperatures_K: entry {i} is {T[i]!r}; expected a value > 0 K")
        if not (math.isfinite(V[i]) and V[i] > 0):
            raise InputError(f"volumes_A3: entry {i} (T = {T[i]:g} K) is {V[i]!r}; "
                             "expected a positive volume in Å³")
    if method == "lowest":
        i = int(np.argmin(T))
        return VolumeChoice(float(V[i]), T0, "lowest",
                            f"mean cell volume of the lowest simulated temperature, {T[i]:g} K "
                            f"({V[i]:.6g} Å³), used at {T0:g} K")
    if method == "linear":
        if len(np.unique(T)) < 2:
            raise InputError("volume_at(method='linear') needs volumes at two or more distinct "
                             "temperatures; use method='lowest'")
        slope, intercept = np.polyfit(T, V, 1)
        v = float(intercept + slope * T0)
        if v <= 0:
            raise InputError(f"a linear extrapolation of the volume to {T0:g} K gives {v:.3g} Å³; "
                             "use method='lowest'")
        return VolumeChoice(v, T0, "linear",
                            f"linear extrapolation of the mean cell volume over {T.min():g}–"
                            f"{T.max():g} K to {T0:g} K ({v:.6g} Å³; slope {slope:.3g} Å³/K)")
    raise UsageError(f"volume method must be 'lowest' or 'linear', got {method!r}")


def fit_arrhenius_sigma_T(temperatures_K, sigma_S_per_cm, sigma_stderr_S_per_cm, *,
                          upper_bounds=None):
    """Arrhenius fit of ln(σT) against 1/T.

    Parameters
    ----------
    temperatures_K : (n,) float, K
    sigma_S_per_cm, sigma_stderr_S_per_cm : (n,) float, S/cm
    upper_bounds : sequence of (T_K, sigma_upper_S_per_cm), optional

    Returns
    -------
    ArrheniusFit
        ``quantity="sigma_T"``, prefactor in S·K/cm.
    """
    T = _as_1d("temperatures_K", temperatures_K)
    s = _as_1d("sigma_S_per_cm", sigma_S_per_cm)
    e = _as_1d("sigma_stderr_S_per_cm", sigma_stderr_S_per_cm)
    if not (len(T) == len(s) == len(e)):
        raise InputError("temperatures_K, sigma_S_per_cm and sigma_stderr_S_per_cm must have the "
                         f"same length; got {len(T)}, {len(s)} and {len(e)}")
    bounds = None
    if upper_bounds is not None:
        bounds = [(float(t), float(b) * float(t)) for t, b in upper_bounds]
    return fit_arrhenius(T, s * T, e * T, upper_bounds=bounds, quantity="sigma_T")


def extrapolate_conductivity(fit, *, temperature_K=300.0, n_ions=None, volume_A3=None, charge=1,
                             haven_ratio=1.0, volume_note=""):
    """σ at a target temperature from an Arrhenius fit, with its 95% bands.

    For a fit of ln D the band of ln D at the target is carried to σ through the
    Nernst–Einstein factor (ln σ = ln D + const, so the delta method is exact here).
    For a fit of ln σT, σ = σT / T and ``n_ions``, ``volume_A3``, ``charge`` are not
    needed; ``haven_ratio`` is then only recorded (it entered when σ was formed).

    Parameters
    ----------
    fit : ArrheniusFit
    temperature_K : float, K
    n_ions : int
        Mobile ions in the cell (fit of D only).
    volume_A3 : float, Å³
        Cell volume at the target (fit of D only): pass the lowest simulated
        temperature's mean volume or a linear extrapolation — see :func:`volume_at`.
    charge : float
    haven_ratio : float
    volume_note : str
        Which volume this is, recorded in the result.

    Returns
    -------
    ExtrapolatedConductivity
    """
    if not isinstance(fit, ArrheniusFit):
        raise UsageError(f"fit: expected an ArrheniusFit, got {type(fit).__name__}")
    T = positive_number("temperature_K", temperature_K)
    point = fit.extrapolate(T)
    if fit.quantity == "D":
        if n_ions is None or volume_A3 is None:
            raise UsageError("σ from a fit of ln D needs n_ions and volume_A3 at the target "
                             "temperature (see diffkit.volume_at)")
        n, V, z = _n_ions(n_ions), positive_number("volume_A3", volume_A3), _charge(charge)
        H = positive_number("haven_ratio", haven_ratio)
        factor = _ne_factor(n, V, T, z) / H
        route = "tracer D via Arrhenius fit of ln D, Nernst-Einstein at the target"
    elif fit.quantity == "sigma_T":
        factor = 1.0 / T
        n = None if n_ions is None else _n_ions(n_ions)
        V = None if volume_A3 is None else positive_number("volume_A3", volume_A3)
        z = None if charge is None else _charge(charge)
        H = None if haven_ratio is None else positive_number("haven_ratio", haven_ratio)
        route = "Arrhenius fit of ln(sigma*T), each temperature with its own volume"
        if not volume_note:
            volume_note = ("each simulated temperature's own mean volume entered sigma*T; no "
                           "volume at the target is needed")
    else:  # pragma: no cover - fit_arrhenius refuses other quantities
        raise UsageError(f"cannot turn a fit of {fit.quantity!r} into a conductivity")
    lo, hi = point.interval95
    plo, phi = point.prediction_interval95
    sigma = factor * point.value
    return ExtrapolatedConductivity(
        temperature_K=T,
        sigma_S_per_cm=sigma,
        sigma_interval95_S_per_cm=(factor * lo, factor * hi),
        sigma_prediction_interval95_S_per_cm=(factor * plo, factor * phi),
        sigma_mS_per_cm=sigma * _MS_PER_S,
        sigma_interval95_mS_per_cm=(factor * lo * _MS_PER_S, factor * hi * _MS_PER_S),
        ln_sigma_stderr=point.ln_stderr,
        statistics=point.statistics,
        route=route,
        haven_ratio=H,
        charge=z,
        n_ions=n,
        volume_A3=V,
        volume_note=volume_note,
        extrapolation_caution=point.extrapolation_caution,
    )


# --------------------------------------------------------------------------- one candidate


def summarize_candidate(name, temperatures_K, D_cm2_per_s, D_stderr_cm2_per_s, *, n_ions,
                        volumes_A3, charge=None, species=None, haven_ratio=1.0, upper_bounds=None,
                        target_K=300.0, tiers=None, volume_method="lowest", route="tracer_D",
                        D_sigma_cm2_per_s=None, D_sigma_stderr_cm2_per_s=None):
    """Arrhenius fit, σ at the target temperature, its band and tier, for one candidate.

    Parameters
    ----------
    name : str
    temperatures_K : (n,) float, K
        Temperatures where hops were seen and D was fitted.
    D_cm2_per_s, D_stderr_cm2_per_s : (n,) float, cm²/s
        Tracer diffusivity of the mobile species and its standard error.
    n_ions : int
        Mobile ions in the cell.
    volumes_A3 : float or (n,) float, Å³
        Mean cell volume of each run (aligned with ``temperatures_K``), or one volume
        used everywhere. With per-run volumes, the target's volume follows
        ``volume_method`` (see :func:`volume_at`).
    charge : float, optional
        z of the mobile ion; default from ``species`` (:func:`default_charge`).
    species : str, optional
        Element symbol of the mobile ion, for the default charge.
    haven_ratio : float
        H_R, default 1; stated in the result.
    upper_bounds : sequence of (T_K, D_upper_cm2_per_s), optional
        Temperatures where no hops were seen.
    target_K : float, K
    tiers : ConductivityTiers, optional
    volume_method : {"lowest", "linear"}
    route : {"tracer_D", "sigma_T"}
        Fit ln D then apply Nernst–Einstein at the target, or apply Nernst–Einstein at
        each temperature and fit ln(σT).
    D_sigma_cm2_per_s, D_sigma_stderr_cm2_per_s : (n,) float, optional
        Collective diffusivities, for the collective σ at each temperature.

    Returns
    -------
    CandidateSummary
        With fewer than two temperatures holding values there is no fit: σ is given at
        the simulated temperature(s), and an upper bound at the target where a bound
        follows (assuming D does not fall with rising temperature).
    """
    tiers = ConductivityTiers() if tiers is None else tiers
    if not isinstance(tiers, ConductivityTiers):
        raise UsageError(f"tiers: expected a ConductivityTiers, got {type(tiers).__name__}")
    if route not in ("tracer_D", "sigma_T"):
        raise UsageError(f"route must be 'tracer_D' or 'sigma_T', got {route!r}")
    if charge is None:
        if species is None:
            raise InputError(f"candidate {name!r}: give charge= or species= (for the default "
                             "charge of alkali, alkaline-earth and Zn ions)")
        charge = default_charge(species)
    z = _charge(charge)
    H = positive_number("haven_ratio", haven_ratio)
    T0 = positive_number("target_K", target_K)
    n = _n_ions(n_ions)
    T, D, se = _check_inputs(temperatures_K, D_cm2_per_s, D_stderr_cm2_per_s, "D")
    if np.ndim(volumes_A3) == 0:
        vols = np.full(len(T), positive_number("volumes_A3", volumes_A3))
    else:
        vols = _as_1d("volumes_A3", volumes_A3)
        if len(vols) != len(T):
            raise InputError(f"volumes_A3: expected one volume per temperature ({len(T)}), "
                             f"got {len(vols)}")
    bounds = _check_bounds(upper_bounds, "D")
    flags, messages = [], []

    per_T = tuple(_from_D(float(D[i]), float(se[i]), n_ions=n, volume_A3=float(vols[i]),
                          temperature_K=float(T[i]), charge=z, haven_ratio=H, route="tracer D",
                          formula="sigma = N q^2 D / (V k_B T H_R)") for i in range(len(T)))
    coll = ()
    if D_sigma_cm2_per_s is not None:
        Ds = _as_1d("D_sigma_cm2_per_s", D_sigma_cm2_per_s)
        Dse = (np.full(len(Ds), np.nan) if D_sigma_stderr_cm2_per_s is None
               else _as_1d("D_sigma_stderr_cm2_per_s", D_sigma_stderr_cm2_per_s))
        if len(Ds) != len(T) or len(Dse) != len(T):
            raise InputError("D_sigma_cm2_per_s (and its stderr) need one value per temperature")
        coll = tuple(collective_conductivity(
            float(Ds[i]), D_sigma_stderr_cm2_per_s=None if np.isnan(Dse[i]) else float(Dse[i]),
            n_ions=n, volume_A3=float(vols[i]), temperature_K=float(T[i]), charge=z)
            for i in range(len(T)))

    def volume_for(t):
        if np.ndim(volumes_A3) == 0:
            v = float(vols[0])
            return VolumeChoice(v, t, "given", f"cell volume given by the caller ({v:.6g} Å³)")
        return volume_at(t, T, vols, volume_method)

    fit = None
    try:
        if route == "tracer_D":
            fit = fit_arrhenius(T, D, se, upper_bounds=upper_bounds, quantity="D")
        else:
            ub = None
            if bounds:
                ub = []
                for tb, db in bounds:
                    vb = volume_for(float(tb)).volume_A3
                    ub.append((float(tb), _ne_factor(n, vb, float(tb), z) / H * float(db)
                               * float(tb)))
            sT = np.array([c.sigma_S_per_cm * c.temperature_K for c in per_T])
            sTe = np.array([c.sigma_stderr_S_per_cm * c.temperature_K for c in per_T])
            fit = fit_arrhenius(T, sT, sTe, upper_bounds=ub, quantity="sigma_T")
    except FitError as exc:
        flags.append("no Arrhenius fit")
        messages.append(f"No Arrhenius fit: {exc}")

    vchoice = volume_for(T0) if route == "tracer_D" else None
    volume_note = (vchoice.description if vchoice is not None else
                   "each simulated temperature's own mean volume entered sigma*T")
    Ea = Ea_se = Ea_int = None
    s_val = s_int = None
    is_bound = False
    statistics = None
    if fit is not None:
        flags.extend(fit.flags)
        messages.extend(fit.messages)
        if route == "tracer_D":
            ext = extrapolate_conductivity(fit, temperature_K=T0, n_ions=n,
                                           volume_A3=vchoice.volume_A3, charge=z, haven_ratio=H,
                                           volume_note=volume_note)
        else:
            ext = extrapolate_conductivity(fit, temperature_K=T0, n_ions=n, charge=z,
                                           haven_ratio=H, volume_note=volume_note)
        Ea, Ea_se, Ea_int = fit.Ea_eV, fit.Ea_stderr_eV, fit.Ea_interval95_eV
        s_val, s_int, statistics = ext.sigma_S_per_cm, ext.sigma_interval95_S_per_cm, ext.statistics
        if ext.extrapolation_caution:
            messages.append(ext.extrapolation_caution)
        tier = tiers.classify(*s_int)
    else:
        # no fit: a bound at the target from bounds and values at temperatures above it,
        # assuming D does not decrease with increasing temperature (Ea >= 0)
        candidates = []
        q = float(_stats.norm.ppf(0.975))
        for tb, db in bounds:
            if tb >= T0:
                candidates.append(db)
        for i in range(len(T)):
            if T[i] >= T0:
                candidates.append(float(D[i] * math.exp(q * se[i] / D[i])))
        if candidates:
            D_bound = min(candidates)
            factor = _ne_factor(n, volume_for(T0).volume_A3, T0, z) / H
            s_val, s_int, is_bound = factor * D_bound, (0.0, factor * D_bound), True
            messages.append(
                f"sigma at {T0:g} K is given as an upper bound, from the lowest bound on D at or "
                f"above {T0:g} K, assuming D does not fall as temperature rises (Ea ≥ 0).")
            tier = tiers.classify(0.0, s_val, is_upper_bound=True)
        else:
            tier = UNRESOLVED_TIER
    if tier == UNRESOLVED_TIER:
        flags.append("tier unresolved")
        if s_int is not None and not is_bound:
            messages.append(
                f"The 95% band of sigma at {T0:g} K ({s_int[0]:.3g}–{s_int[1]:.3g} S/cm) spans "
                "more than one screening tier; more or longer runs would narrow it.")
    if route == "tracer_D":
        desc = (f"tracer D fitted as ln D against 1/T, Nernst-Einstein at {T0:g} K with Haven "
                f"ratio {H:g} and charge {z:g}")
    else:
        desc = (f"Nernst-Einstein at each simulated temperature (Haven ratio {H:g}, charge "
                f"{z:g}), then ln(sigma*T) fitted against 1/T and evaluated at {T0:g} K")
    return CandidateSummary(
        name=str(name), route=route, route_description=desc, target_temperature_K=T0,
        Ea_eV=Ea, Ea_stderr_eV=Ea_se, Ea_interval95_eV=Ea_int,
        sigma_target_S_per_cm=s_val,
        sigma_target_interval95_S_per_cm=s_int,
        sigma_target_mS_per_cm=None if s_val is None else s_val * _MS_PER_S,
        sigma_target_interval95_mS_per_cm=(None if s_int is None else
                                           (s_int[0] * _MS_PER_S, s_int[1] * _MS_PER_S)),
        sigma_target_is_upper_bound=is_bound, tier=tier, tiers=tiers, haven_ratio=H, charge=z,
        n_ions=n, volume_A3=None if vchoice is None else vchoice.volume_A3,
        volume_note=volume_note, statistics=statistics, fit=fit, sigma_at_temperatures=per_T,
        sigma_collective_at_temperatures=coll, flags=tuple(flags), messages=tuple(messages),
        cautions=CAUTIONS)
