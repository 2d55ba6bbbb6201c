"""Arrhenius fits of diffusivities (or of σT) over temperature, with honest bands.

The model is ``ln y(T) = ln y0 − Ea / (k_B T)``, fitted by weighted least squares
of ``ln y`` against ``x = 1 / (k_B T)`` (x in 1/eV). ``y`` is the tracer
diffusivity D (``quantity="D"``, cm²/s) or the product σT of conductivity and
temperature (``quantity="sigma_T"``, S·K/cm). The error of ``ln y`` is taken as
``stderr(y) / y`` (first-order propagation), so weights are ``(y / stderr)²``.

Statistics rule (reported in :attr:`ArrheniusFit.statistics`):

* the per-point errors are taken as known and normal quantiles are used, unless
* the reduced χ² exceeds 1 (the scatter about the line is larger than the error
  bars say): then the covariance is scaled by χ²_red (errors by √χ²_red) and
  Student t quantiles with n − 2 degrees of freedom are used.

With two temperatures there is no scatter to judge (zero degrees of freedom),
so the errors are taken as known and the result says so.

Temperatures where no hops were seen enter as upper bounds: they are kept out of
the least squares, kept in the result, and checked against the fitted line.
A quadratic term in 1/T that is significant at 95% raises a curvature flag
(the mechanism may change across the range).
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field, replace

import numpy as np
from scipy import stats as _stats

from .errors import FitError, InputError, UsageError, DiffkitWarning
from .units import A2_PER_PS_IN_CM2_PER_S, K_B_EV_PER_K
from .results import frozen_array, to_plain

__all__ = [
    "fit_arrhenius",
    "ArrheniusFit",
    "ArrheniusPoint",
    "ArrheniusBand",
    "UpperBoundCheck",
    "STATISTICS_NORMAL",
    "STATISTICS_STUDENT_T",
    "QUANTITIES",
]

#: Value of :attr:`ArrheniusFit.statistics` when the per-point errors are taken as known.
STATISTICS_NORMAL = "normal: errors taken as known"
#: Value of :attr:`ArrheniusFit.statistics` when the errors were scaled by √χ²_red.
STATISTICS_STUDENT_T = "student-t, errors scaled by sqrt(chi2_red)"

#: What can be fitted: quantity name -> (symbol used in field names, unit suffix, readable unit).
QUANTITIES = {
    "D": ("D", "cm2_per_s", "cm²/s"),
    "sigma_T": ("sigmaT", "S_K_per_cm", "S·K/cm"),
}

# A "cm²/s" diffusivity above this is almost surely a value in Å²/ps (common practice:
# diffusivities in solids and liquids are below ~1e-3 cm²/s).
_SUSPICIOUS_D_CM2_PER_S = 1e-2
# Relative error above which first-order ln-space propagation is a rough approximation.
_LARGE_RELATIVE_ERROR = 0.5
_CONFIDENCE = 0.95


# --------------------------------------------------------------------------- helpers


def _fmt_interval(lo, hi, fmt=".3g"):
    return f"[{lo:{fmt}}, {hi:{fmt}}]"


def _quantile(statistics, dof):
    """Two-sided 95% quantile for the chosen statistics."""
    if statistics == STATISTICS_STUDENT_T:
        return float(_stats.t.ppf(0.5 + _CONFIDENCE / 2, dof))
    return float(_stats.norm.ppf(0.5 + _CONFIDENCE / 2))


def _wls(design, y, weights):
    """Weighted least squares on well-scaled columns.

    Returns (coefficients, unscaled covariance (XᵀWX)⁻¹, χ²).
    """
    sw = np.sqrt(weights)
    a = design * sw[:, None]
    b = y * sw
    coef, *_ = np.linalg.lstsq(a, b, rcond=None)
    cov = np.linalg.inv(a.T @ a)
    resid = b - a @ coef
    return coef, cov, float(resid @ resid)


def _line_fit(x, y, w):
    """Fit ``y = c − Ea x`` by WLS; returns (c, Ea, covariance of (c, Ea), χ²).

    The fit is done on centred x for conditioning and transformed back exactly.
    """
    xbar = float(np.sum(w * x) / np.sum(w))
    design = np.column_stack([np.ones_like(x), -(x - xbar)])
    (c_centred, ea), cov_c, chi2 = _wls(design, y, w)
    jac = np.array([[1.0, xbar], [0.0, 1.0]])  # (c, Ea) = J (c_centred, Ea)
    cov = jac @ cov_c @ jac.T
    return c_centred + ea * xbar, float(ea), cov, chi2


def _curvature_test(x, y, w):
    """Test a quadratic term in x = 1/(k_B T); returns (z or t statistic, p value, statistics)."""
    n = len(x)
    u = (x - x.mean()) / x.std()
    design = np.column_stack([np.ones_like(u), u, u * u])
    coef, cov, chi2 = _wls(design, y, w)
    dof = n - 3
    statistics = STATISTICS_NORMAL
    if dof > 0 and chi2 / dof > 1.0:
        cov = cov * (chi2 / dof)
        statistics = STATISTICS_STUDENT_T
    score = float(coef[2] / math.sqrt(cov[2, 2]))
    if statistics == STATISTICS_STUDENT_T:
        p = float(2.0 * _stats.t.sf(abs(score), dof))
    else:
        p = float(2.0 * _stats.norm.sf(abs(score)))
    return score, p, statistics


def _as_1d(name, values):
    try:
        arr = np.asarray(values, dtype=float)
    except (TypeError, ValueError) as exc:
        raise InputError(f"{name}: expected a sequence of numbers, got {values!r}") from exc
    if arr.ndim == 0:
        arr = arr.reshape(1)
    if arr.ndim != 1:
        raise InputError(f"{name}: expected a one-dimensional sequence, got shape {arr.shape}")
    return arr


# --------------------------------------------------------------------------- results


@dataclass(frozen=True, eq=False)
class ArrheniusPoint:
    """The fitted line evaluated at one temperature, with its bands.

    Attributes
    ----------
    temperature_K : float
    quantity : str
        ``"D"`` or ``"sigma_T"``.
    value_unit : str
        Unit suffix of ``value`` (``"cm2_per_s"`` for D, ``"S_K_per_cm"`` for σT).
    value : float
        The line's value exp(ln y0 − Ea/(k_B T)).
    interval95 : (float, float)
        95% confidence interval of the mean line (where the true value lies if the
        model holds).
    prediction_interval95 : (float, float)
        95% prediction interval: where a new measurement at this temperature, with
        the typical per-point error of the fitted data (RMS of the ln errors, scaled
        like the fit), would fall.
    ln_value, ln_stderr, ln_prediction_stderr : float
        The same in ln space (the bands are symmetric there).
    statistics : str
        The fit's statistics rule (normal or Student t).
    inside_fitted_range : bool
    extrapolation_caution : str
        Plain-words caution when the temperature is outside the fitted range, else "".
    """

    temperature_K: float
    quantity: str
    value_unit: str
    value: float
    interval95: tuple
    prediction_interval95: tuple
    ln_value: float
    ln_stderr: float
    ln_prediction_stderr: float
    statistics: str
    inside_fitted_range: bool
    extrapolation_caution: str

    def _named_values(self):
        sym, unit, _ = QUANTITIES[self.quantity]
        return {
            f"{sym}_{unit}": self.value,
            f"{sym}_interval95_{unit}": self.interval95,
            f"{sym}_prediction_interval95_{unit}": self.prediction_interval95,
        }

    def _require(self, quantity):
        if self.quantity != quantity:
            raise UsageError(f"this point is of {self.quantity!r}, not {quantity!r}; "
                             f"use .value (unit {self.value_unit})")

    @property
    def D_cm2_per_s(self):
        """D at this temperature (cm²/s); only for a fit of D."""
        self._require("D")
        return self.value

    @property
    def D_interval95_cm2_per_s(self):
        """95% confidence interval of D (cm²/s); only for a fit of D."""
        self._require("D")
        return self.interval95

    @property
    def D_prediction_interval95_cm2_per_s(self):
        """95% prediction interval of D (cm²/s); only for a fit of D."""
        self._require("D")
        return self.prediction_interval95

    def to_dict(self):
        """JSON-ready dict of every field plus the unit-named aliases."""
        return to_plain(self)

    def __repr__(self):
        sym, _, unit_text = QUANTITIES[self.quantity]
        lo, hi = self.interval95
        text = (f"ArrheniusPoint({sym}({self.temperature_K:g} K) = {self.value:.3g} {unit_text}, "
                f"95% CI {_fmt_interval(lo, hi)}")
        if not self.inside_fitted_range:
            text += ", extrapolated"
        return text + ")"


@dataclass(frozen=True, eq=False)
class ArrheniusBand:
    """The fitted line and its 95% bands on a grid of temperatures (for plots).

    Attributes
    ----------
    temperatures_K : (m,) float
    value, lower95, upper95, prediction_lower95, prediction_upper95 : (m,) float
        In the unit of the fitted quantity (``value_unit``).
    value_unit : str
    """

    temperatures_K: np.ndarray
    value: np.ndarray
    lower95: np.ndarray
    upper95: np.ndarray
    prediction_lower95: np.ndarray
    prediction_upper95: np.ndarray
    value_unit: str

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)

    def __repr__(self):
        t = self.temperatures_K
        return f"ArrheniusBand({len(t)} temperatures, {t.min():g}–{t.max():g} K, {self.value_unit})"


@dataclass(frozen=True, eq=False)
class UpperBoundCheck:
    """One no-hop temperature's upper bound checked against the fitted line.

    Attributes
    ----------
    temperature_K : float
    upper_bound : float
        The bound, in ``value_unit``.
    predicted : float
        The fitted line at this temperature.
    predicted_interval95 : (float, float)
        95% confidence interval of the line there.
    conflict : bool
        True when the lower edge of that interval lies above the bound: the fit says
        the ions should have moved faster than the bound allows.
    message : str
    value_unit : str
    """

    temperature_K: float
    upper_bound: float
    predicted: float
    predicted_interval95: tuple
    conflict: bool
    message: str
    value_unit: str

    def to_dict(self):
        """JSON-ready dict."""
        return to_plain(self)

    def __repr__(self):
        state = "CONFLICT" if self.conflict else "consistent"
        return (f"UpperBoundCheck({self.temperature_K:g} K: bound {self.upper_bound:.3g}, "
                f"fit {self.predicted:.3g}, {state})")


@dataclass(frozen=True, eq=False)
class ArrheniusFit:
    """Result of :func:`fit_arrhenius`.

    Attributes
    ----------
    quantity : str
        ``"D"`` (ln D fitted) or ``"sigma_T"`` (ln σT fitted).
    value_unit : str
        Unit suffix of the fitted quantity and prefactor: ``"cm2_per_s"`` or ``"S_K_per_cm"``.
    Ea_eV, Ea_stderr_eV : float
        Activation energy and its standard error (scaled when ``statistics`` is Student t).
    Ea_interval95_eV : (float, float)
    ln_prefactor, ln_prefactor_stderr : float
        ln of the prefactor (in ``value_unit``) and its standard error. This is the
        primary error of the prefactor.
    prefactor : float
        exp(ln_prefactor), e.g. D0 in cm²/s (also as ``D0_cm2_per_s``).
    prefactor_stderr : float
        prefactor × ln_prefactor_stderr (first-order; the distribution is lognormal,
        so prefer ``prefactor_interval95``, which is exact in ln space).
    prefactor_interval95 : (float, float)
    covariance : (2, 2) float
        Covariance of the parameters in the order of ``covariance_order``:
        (ln_prefactor [1], Ea_eV [eV]); units [[1, eV], [eV, eV²]]. Scaled by χ²_red
        when the statistics are Student t (it is the covariance used for every band).
    covariance_order : (str, str)
    scale_factor : float
        √χ²_red when errors were scaled, else 1.
    chi2, chi2_reduced : float
        χ² of the weighted residuals and χ²/(n − 2) (NaN for two points).
    dof : int
        n − 2.
    n_points : int
        Temperatures in the least squares (after combining duplicates).
    statistics : str
        :data:`STATISTICS_NORMAL` or :data:`STATISTICS_STUDENT_T`.
    quantile95 : float
        The two-sided 95% quantile used (1.96 or the t value).
    temperatures_K, ln_values, ln_stderr : (n,) float
        The data as fitted (duplicates combined; ln of the value in ``value_unit``).
    fitted_range_K : (float, float)
    Ea_leave_one_out_eV : (n,) float
        Ea refitted with each temperature left out in turn (empty for n = 2).
    Ea_leave_one_out_spread_eV : float
        max − min of those refits (NaN for n = 2): how much Ea moves when any one
        temperature is dropped.
    curvature_flag : bool
        True when a quadratic term in 1/T is significant at 95%.
    curvature_p_value : float
        Two-sided p value of that term (NaN with fewer than three temperatures).
    upper_bounds : tuple of UpperBoundCheck
    upper_bound_conflict : bool
    flags : tuple of str
        Short plain-word labels: ``"curvature"``, ``"upper bound conflict"``,
        ``"scatter exceeds error bars"`` (χ² significant at 95%; the errors are scaled
        whenever χ²_red > 1), ``"two temperatures only"``,
        ``"duplicate temperatures combined"``, ``"large relative error"``.
    messages : tuple of str
        One plain sentence per flag or remark.
    """

    quantity: str
    value_unit: str
    Ea_eV: float
    Ea_stderr_eV: float
    Ea_interval95_eV: tuple
    ln_prefactor: float
    ln_prefactor_stderr: float
    prefactor: float
    prefactor_stderr: float
    prefactor_interval95: tuple
    covariance: np.ndarray
    covariance_order: tuple
    scale_factor: float
    chi2: float
    chi2_reduced: float
    dof: int
    n_points: int
    statistics: str
    quantile95: float
    temperatures_K: np.ndarray
    ln_values: np.ndarray
    ln_stderr: np.ndarray
    fitted_range_K: tuple
    Ea_leave_one_out_eV: np.ndarray
    Ea_leave_one_out_spread_eV: float
    curvature_flag: bool
    curvature_p_value: float
    upper_bounds: tuple = ()
    upper_bound_conflict: bool = False
    flags: tuple = ()
    messages: tuple = field(default=())

    # ---- named aliases of the prefactor -------------------------------------------

    def _require(self, quantity):
        if self.quantity != quantity:
            sym, unit, _ = QUANTITIES[self.quantity]
            raise UsageError(f"this is a fit of {self.quantity!r}; its prefactor is "
                             f"{sym}0_{unit} (or .prefactor)")

    @property
    def D0_cm2_per_s(self):
        """Prefactor D0 in cm²/s (fit of D only)."""
        self._require("D")
        return self.prefactor

    @property
    def D0_stderr_cm2_per_s(self):
        """First-order standard error of D0, D0 × stderr(ln D0), cm²/s (fit of D only)."""
        self._require("D")
        return self.prefactor_stderr

    @property
    def D0_interval95_cm2_per_s(self):
        """95% interval of D0 in cm²/s, exact in ln space (fit of D only)."""
        self._require("D")
        return self.prefactor_interval95

    @property
    def ln_D0_stderr(self):
        """Standard error of ln D0 (fit of D only)."""
        self._require("D")
        return self.ln_prefactor_stderr

    def _named_values(self):
        sym, unit, _ = QUANTITIES[self.quantity]
        return {
            f"{sym}0_{unit}": self.prefactor,
            f"{sym}0_stderr_{unit}": self.prefactor_stderr,
            f"{sym}0_interval95_{unit}": self.prefactor_interval95,
        }

    # ---- evaluation ---------------------------------------------------------------

    def _ln_mean_and_var(self, temperatures_K):
        t = np.asarray(temperatures_K, dtype=float)
        if np.any(~np.isfinite(t)) or np.any(t <= 0):
            raise InputError(f"temperature must be finite and > 0 K, got {temperatures_K!r}")
        x = 1.0 / (K_B_EV_PER_K * t)
        ln_mean = self.ln_prefactor - self.Ea_eV * x
        c = self.covariance
        var = c[0, 0] - 2.0 * x * c[0, 1] + x * x * c[1, 1]
        return t, ln_mean, np.sqrt(np.maximum(var, 0.0))

    def _typical_point_stderr(self):
        # RMS of the fitted ln errors, scaled like the fit
        return float(np.sqrt(np.mean(self.ln_stderr ** 2))) * self.scale_factor

    def _caution(self, T):
        lo, hi = self.fitted_range_K
        if lo <= T <= hi:
            return ""
        edge = lo if T < lo else hi
        span = abs(1000.0 / lo - 1000.0 / hi)
        gap = abs(1000.0 / T - 1000.0 / edge)
        text = (f"{T:g} K lies outside the fitted range {lo:g}–{hi:g} K. The fit assumes one "
                f"mechanism and no phase change between {edge:g} K and {T:g} K; the value is a "
                "screening estimate, not a measurement.")
        if span == 0 or gap > span:
            text += (f" This is a far extrapolation (the gap in 1000/T, {gap:.2f}, exceeds the "
                     f"fitted span, {span:.2f}, with T in K): the band widens and any change of mechanism "
                     "the simulations did not see would move the value outside it.")
        return text

    def extrapolate(self, temperature_K):
        """Evaluate the fitted line at one temperature.

        Parameters
        ----------
        temperature_K : float, K

        Returns
        -------
        ArrheniusPoint
            Value with its 95% confidence interval (of the mean line), its 95%
            prediction interval, and a caution when outside the fitted range.
        """
        try:
            T = float(temperature_K)
        except (TypeError, ValueError) as exc:
            raise InputError(f"temperature_K: expected one number, got {temperature_K!r}") from exc
        _, ln_mean, se = self._ln_mean_and_var(T)
        ln_mean, se = float(ln_mean), float(se)
        se_pred = math.hypot(se, self._typical_point_stderr())
        q = self.quantile95
        lo, hi = self.fitted_range_K
        return ArrheniusPoint(
            temperature_K=T,
            quantity=self.quantity,
            value_unit=self.value_unit,
            value=math.exp(ln_mean),
            interval95=(math.exp(ln_mean - q * se), math.exp(ln_mean + q * se)),
            prediction_interval95=(math.exp(ln_mean - q * se_pred), math.exp(ln_mean + q * se_pred)),
            ln_value=ln_mean,
            ln_stderr=se,
            ln_prediction_stderr=se_pred,
            statistics=self.statistics,
            inside_fitted_range=bool(lo <= T <= hi),
            extrapolation_caution=self._caution(T),
        )

    def band(self, temperatures_K):
        """The line and its 95% bands on a grid of temperatures.

        Parameters
        ----------
        temperatures_K : (m,) float, K

        Returns
        -------
        ArrheniusBand
        """
        t, ln_mean, se = self._ln_mean_and_var(np.atleast_1d(temperatures_K))
        se_pred = np.hypot(se, self._typical_point_stderr())
        q = self.quantile95
        return ArrheniusBand(
            temperatures_K=frozen_array(t),
            value=frozen_array(np.exp(ln_mean)),
            lower95=frozen_array(np.exp(ln_mean - q * se)),
            upper95=frozen_array(np.exp(ln_mean + q * se)),
            prediction_lower95=frozen_array(np.exp(ln_mean - q * se_pred)),
            prediction_upper95=frozen_array(np.exp(ln_mean + q * se_pred)),
            value_unit=self.value_unit,
        )

    def to_dict(self):
        """JSON-ready dict of every field plus the unit-named prefactor aliases."""
        return to_plain(self)

    def __repr__(self):
        sym, _, unit_text = QUANTITIES[self.quantity]
        lo, hi = self.fitted_range_K
        chi = "n/a" if not math.isfinite(self.chi2_reduced) else f"{self.chi2_reduced:.2f}"
        flags = ", ".join(self.flags) if self.flags else "none"
        return (f"ArrheniusFit(Ea = {self.Ea_eV:.4g} ± {self.Ea_stderr_eV:.2g} eV, "
                f"{sym}0 = {self.prefactor:.3g} {unit_text}, {self.n_points} temperatures "
                f"{lo:g}–{hi:g} K, chi2_red = {chi}, {self.statistics}; flags: {flags})")


# --------------------------------------------------------------------------- the fit


def _check_inputs(temperatures_K, values, stderr, quantity):
    sym, unit, unit_text = QUANTITIES[quantity]
    vname, ename = f"{sym}_{unit}", f"{sym}_stderr_{unit}"
    T = _as_1d("temperatures_K", temperatures_K)
    y = _as_1d(vname, values)
    e = _as_1d(ename, stderr)
    if not (len(T) == len(y) == len(e)):
        raise InputError(f"temperatures_K, {vname} and {ename} must have the same length; "
                         f"got {len(T)}, {len(y)} and {len(e)}")
    for i in range(len(T)):
        where = f"entry {i} (T = {T[i]:g} K)"
        if not math.isfinite(T[i]) or T[i] <= 0:
            raise InputError(f"temperatures_K: {where} is not a temperature; "
                             "expected a finite value > 0 K")
        if not math.isfinite(y[i]) or y[i] <= 0:
            raise InputError(f"{vname}: {where} is {y[i]!r}; expected a positive finite value "
                             f"in {unit_text} (no hops seen? pass the bound as upper_bounds=)")
        if not math.isfinite(e[i]) or e[i] <= 0:
            raise InputError(f"{ename}: {where} is {e[i]!r}; expected a positive finite error "
                             "(a zero error would give the point infinite weight)")
    if quantity == "D":
        big = np.nonzero(y > _SUSPICIOUS_D_CM2_PER_S)[0]
        if len(big):
            i = int(big[0])
            warnings.warn(
                f"{vname}: entry {i} (T = {T[i]:g} K) is {y[i]:.3g} cm²/s, far above "
                "diffusivities in solids; it looks like a value in Å²/ps "
                f"(1 Å²/ps = {A2_PER_PS_IN_CM2_PER_S:g} cm²/s). Convert with "
                "diffkit.units.a2ps_to_cm2s if so.",
                DiffkitWarning, stacklevel=3)
    return T, y, e


def _combine_duplicates(T, ln_y, ln_e, messages, flags):
    order = np.argsort(T, kind="stable")
    T, ln_y, ln_e = T[order], ln_y[order], ln_e[order]
    groups = []
    for i in range(len(T)):
        if groups and math.isclose(T[i], T[groups[-1][0]], rel_tol=1e-9, abs_tol=1e-6):
            groups[-1].append(i)
        else:
            groups.append([i])
    if all(len(g) == 1 for g in groups):
        return T, ln_y, ln_e
    Tc, yc, ec, combined = [], [], [], []
    for g in groups:
        w = 1.0 / ln_e[g] ** 2
        Tc.append(float(T[g[0]]))
        yc.append(float(np.sum(w * ln_y[g]) / np.sum(w)))
        ec.append(float(1.0 / math.sqrt(np.sum(w))))
        if len(g) > 1:
            combined.append(f"{T[g[0]]:g} K ({len(g)} values)")
    text = ("duplicate temperatures were combined by inverse-variance weighting in ln space: "
            + ", ".join(combined))
    warnings.warn(text, DiffkitWarning, stacklevel=3)
    messages.append(text[0].upper() + text[1:] + ".")
    flags.append("duplicate temperatures combined")
    return np.array(Tc), np.array(yc), np.array(ec)


def _check_bounds(upper_bounds, quantity):
    sym, unit, unit_text = QUANTITIES[quantity]
    if upper_bounds is None:
        return []
    try:
        pairs = [tuple(p) for p in upper_bounds]
    except TypeError as exc:
        raise InputError("upper_bounds: expected a list of (T_K, upper bound) pairs, "
                         f"got {upper_bounds!r}") from exc
    out = []
    for i, p in enumerate(pairs):
        if len(p) != 2:
            raise InputError(f"upper_bounds: entry {i} is {p!r}; expected a pair "
                             f"(T_K, {sym}_upper_{unit})")
        try:
            T, b = float(p[0]), float(p[1])
        except (TypeError, ValueError) as exc:
            raise InputError(f"upper_bounds: entry {i} is {p!r}; expected two numbers") from exc
        if not math.isfinite(T) or T <= 0:
            raise InputError(f"upper_bounds: entry {i} has temperature {p[0]!r}; "
                             "expected a finite value > 0 K")
        if not math.isfinite(b) or b <= 0:
            raise InputError(f"upper_bounds: entry {i} (T = {T:g} K) has bound {p[1]!r}; "
                             f"expected a positive finite value in {unit_text}")
        out.append((T, b))
    return out


def fit_arrhenius(temperatures_K, D_cm2_per_s, D_stderr_cm2_per_s, *, upper_bounds=None,
                  quantity="D"):
    """Weighted least-squares Arrhenius fit of ln D (or ln σT) against 1/T.

    Parameters
    ----------
    temperatures_K : (n,) float, K
        Temperatures where the quantity was measured (hops seen).
    D_cm2_per_s : (n,) float, cm²/s
        Tracer diffusivity at each temperature. For ``quantity="sigma_T"`` this holds
        σT in S·K/cm instead.
    D_stderr_cm2_per_s : (n,) float
        Standard error of each value (same unit). ln-space error = stderr / value.
    upper_bounds : sequence of (T_K, bound) pairs, optional
        Temperatures where no hops were seen, with the upper bound of the quantity
        (same unit). Kept out of the least squares, checked against the fit.
    quantity : {"D", "sigma_T"}
        What is fitted; sets the unit names in the result.

    Returns
    -------
    ArrheniusFit

    Raises
    ------
    InputError
        Non-positive or non-finite values, errors or temperatures; mismatched lengths.
    FitError
        Fewer than two distinct temperatures with values.

    Warns
    -----
    DiffkitWarning
        Duplicate temperatures (combined); a D above 1e-2 "cm²/s" (probably Å²/ps).
    """
    if quantity not in QUANTITIES:
        raise UsageError(f"quantity must be one of {sorted(QUANTITIES)}, got {quantity!r}")
    sym, unit, unit_text = QUANTITIES[quantity]
    T, y, e = _check_inputs(temperatures_K, D_cm2_per_s, D_stderr_cm2_per_s, quantity)
    bounds = _check_bounds(upper_bounds, quantity)
    messages, flags = [], []

    ln_y, ln_e = np.log(y), e / y
    large = np.nonzero(ln_e > _LARGE_RELATIVE_ERROR)[0]
    T, ln_y, ln_e = _combine_duplicates(T, ln_y, ln_e, messages, flags)
    if len(T) < 2:
        got = "none" if len(T) == 0 else f"one ({T[0]:g} K)"
        raise FitError(
            f"an Arrhenius fit needs {sym} at two or more distinct temperatures; got {got}. "
            "A single temperature can still be reported on its own (e.g. with "
            "diffkit.nernst_einstein at that temperature).")
    if len(large):
        messages.append(
            f"{len(large)} value(s) have a relative error above {_LARGE_RELATIVE_ERROR:.0%}; "
            "the ln-space error (stderr/value) is then only a rough approximation.")
        flags.append("large relative error")

    x = 1.0 / (K_B_EV_PER_K * T)
    w = 1.0 / ln_e ** 2
    n = len(T)
    ln_a, ea, cov, chi2 = _line_fit(x, ln_y, w)
    dof = n - 2
    chi2_red = chi2 / dof if dof > 0 else float("nan")
    if dof > 0 and chi2_red > 1.0:
        statistics, scale = STATISTICS_STUDENT_T, math.sqrt(chi2_red)
        cov = cov * chi2_red
        messages.append(
            f"The scatter about the line exceeds the error bars (chi2_red = {chi2_red:.2f}): "
            f"errors were scaled by {scale:.2f} and Student t with {dof} degrees of freedom used.")
        if _stats.chi2.sf(chi2, dof) < 1.0 - _CONFIDENCE:
            flags.append("scatter exceeds error bars")
    else:
        statistics, scale = STATISTICS_NORMAL, 1.0
    if dof == 0:
        flags.append("two temperatures only")
        messages.append("Only two temperatures: the line passes through both points, so the "
                        "scatter about it cannot be checked; the errors are taken as known.")
    q = _quantile(statistics, dof)
    se_ea = math.sqrt(cov[1, 1])
    se_a = math.sqrt(cov[0, 0])

    # leave one temperature out
    if n >= 3:
        loo = []
        for k in range(n):
            keep = np.arange(n) != k
            loo.append(_line_fit(x[keep], ln_y[keep], w[keep])[1])
        loo = np.array(loo)
        spread = float(loo.max() - loo.min())
    else:
        loo, spread = np.array([]), float("nan")

    # curvature in 1/T
    if n >= 3:
        score, p_curv, _ = _curvature_test(x, ln_y, w)
        curved = p_curv < 1.0 - _CONFIDENCE
    else:
        p_curv, curved = float("nan"), False
    if curved:
        flags.append("curvature")
        messages.append(
            f"ln {sym} bends against 1/T (quadratic term significant, p = {p_curv:.3g}): the "
            "mechanism may change across the temperature range, and a straight-line "
            "extrapolation may not hold.")

    fit = ArrheniusFit(
        quantity=quantity,
        value_unit=unit,
        Ea_eV=ea,
        Ea_stderr_eV=se_ea,
        Ea_interval95_eV=(ea - q * se_ea, ea + q * se_ea),
        ln_prefactor=float(ln_a),
        ln_prefactor_stderr=se_a,
        prefactor=math.exp(ln_a),
        prefactor_stderr=math.exp(ln_a) * se_a,
        prefactor_interval95=(math.exp(ln_a - q * se_a), math.exp(ln_a + q * se_a)),
        covariance=frozen_array(cov),
        covariance_order=("ln_prefactor", "Ea_eV"),
        scale_factor=scale,
        chi2=chi2,
        chi2_reduced=chi2_red,
        dof=dof,
        n_points=n,
        statistics=statistics,
        quantile95=q,
        temperatures_K=frozen_array(T),
        ln_values=frozen_array(ln_y),
        ln_stderr=frozen_array(ln_e),
        fitted_range_K=(float(T.min()), float(T.max())),
        Ea_leave_one_out_eV=frozen_array(loo),
        Ea_leave_one_out_spread_eV=spread,
        curvature_flag=bool(curved),
        curvature_p_value=float(p_curv),
    )

    checks = []
    for Tb, b in bounds:
        pt = fit.extrapolate(Tb)
        lo, hi = pt.interval95
        conflict = lo > b
        if conflict:
            msg = (f"At {Tb:g} K no hops were seen ({sym} ≤ {b:.3g} {unit_text}), but the fit "
                   f"predicts {pt.value:.3g} {unit_text} (95% CI {_fmt_interval(lo, hi)}), "
                   "clearly above the bound: the line overestimates there, or the mechanism "
                   "changes at low temperature.")
        else:
            msg = (f"The upper bound at {Tb:g} K ({sym} ≤ {b:.3g} {unit_text}) is consistent "
                   f"with the fit ({pt.value:.3g} {unit_text}).")
        checks.append(UpperBoundCheck(Tb, b, pt.value, pt.interval95, bool(conflict), msg, unit))
    conflict_any = any(c.conflict for c in checks)
    if conflict_any:
        flags.append("upper bound conflict")
        messages.extend(c.message for c in checks if c.conflict)

    return replace(fit, upper_bounds=tuple(checks), upper_bound_conflict=conflict_any,
                    flags=tuple(flags), messages=tuple(messages))
