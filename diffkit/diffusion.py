"""Diffusion coefficients from an MSD curve, with error bars that can be trusted.

The model fitted in the window is MSD(t) = 2 d D t + c with a free offset c
(thermal vibration adds a constant ~2 d sigma^2). The estimator is a linear
combination of the MSD values at the sampled lags of the window:

* ``"gls"`` (default): generalised least squares with the covariance of the
  time-averaged MSD of a random walk plus localisation (vibration) noise
  (Bullerjahn, von Bülow & Hummer, J. Chem. Phys. 153, 024116 (2020)),
  extended by the fourth-cumulant term of a jump process; the model's
  parameters come from the data. The covariance only sets the weights; the
  error bar comes from the spread of the same weighted slope over the ions
  (ions are independent in the models this is calibrated on) with a Student t
  quantile on n_ions - 1 degrees of freedom. A single ion gets its error from
  time blocks of its path; without per-ion curves the error comes from the
  model covariance itself, with the 95% interval found by inverting the model
  (the variance grows with D, so the interval is not symmetric).
* ``"ols"``: ordinary least squares on the same lags, error bars as above.
* ``"bootstrap"``: the GLS slope, its interval from resampling ions
  (percentile), seeded from a hash of the MSD data so results repeat.

The collective MSD is a single path: ``D_sigma`` and its error come from time
blocks of the summed displacement (or, on request or when the run is too short,
from the model covariance of one path). See docs/methods_diffusion.md for the
equations, the window rule, the measured coverage, the upper-bound rule and
the dimensionality rule.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
from dataclasses import dataclass

import numpy as np
from scipy import linalg as _la
from scipy import stats as _stats

from .errors import UsageError
from .msd import ChargeMSDCurve, MSDCurve, _as_dict, _msd_of_track, thinned_lags
from .units import a2ps_to_cm2s

__all__ = ["DiffusionEstimate", "ChargeTransportEstimate", "estimate_diffusion",
           "estimate_charge_transport", "choose_fit_window", "msd_model_covariance",
           "DIMENSIONALITY_LABELS", "METHODS"]

#: Accepted values of ``method=``.
METHODS = ("gls", "ols", "bootstrap")
#: Dimensionality labels, by number of conducting principal directions.
DIMENSIONALITY_LABELS = {0: "localised", 1: "channel", 2: "plane", 3: "network"}

_DIM = 3
#: Each time block's fit window ends at this fraction of the block (coverage was
#: measured for 0.1-1/3; shorter windows average more and are less skewed).
_BLOCK_WINDOW_FRACTION = 0.2


# =========================================================================== model covariance
def _sum_pow(p, n):
    """sum_{i=0}^{n-1} i^p for p = 1, 2, 3 (float arrays, n >= 0)."""
    n = np.maximum(n, 0.0)
    if p == 1:
        return n * (n - 1) / 2
    if p == 2:
        return (n - 1) * n * (2 * n - 1) / 6
    return (n * (n - 1) / 2) ** 2


def _cnt(k, m, p, n):
    """Number of origin pairs (t, t + k) for lags m, p in a run of n frames."""
    return np.maximum(0, np.minimum(n - m - 1, n - p - 1 - k) - np.maximum(0, -k) + 1)


def _ov(k, m, p):
    """Overlap, in frames, of [t, t + m] and [t + k, t + k + p]."""
    return np.maximum(0, np.minimum(m, k + p) - np.maximum(0, k))


def _pair_sums(m, p, n):
    """Sums A, B, E, G over origin pairs for lags m <= p (arrays), run of n frames.

    With c(k) = s^2 ov(k) + sigma^2 e(k) the covariance of two displacements
    whose origins differ by k, and cnt(k) the number of such origin pairs:
    A = sum cnt ov^2, B = 2 sum cnt ov e, E = sum cnt e^2, G = sum cnt ov.
    ov is piecewise linear in k, so A and G are sums of polynomials (closed
    form); e is non-zero at four values of k only.
    """
    m = np.asarray(m, dtype=np.int64)
    p = np.asarray(p, dtype=np.int64)
    c1 = (n - m - p).astype(float)
    i0 = np.maximum(0.0, -c1)
    mf = m.astype(float)
    s1 = _sum_pow(1, mf) - _sum_pow(1, i0)
    s2 = _sum_pow(2, mf) - _sum_pow(2, i0)
    s3 = _sum_pow(3, mf) - _sum_pow(3, i0)
    mid = (p - m + 1).astype(float) * (n - p).astype(float)
    A = 2.0 * (c1 * s2 + s3) + mid * mf * mf
    G = 2.0 * (c1 * s1 + s2) + mid * mf
    ks = np.stack([m - p, m, -p, np.zeros_like(m)])
    sg = np.stack([np.ones_like(m), -np.ones_like(m), -np.ones_like(m), np.ones_like(m)]).astype(float)
    same = m == p                                  # k = m - p = 0 twice: merge into one entry
    sg[0] = np.where(same, 2.0, 1.0)
    sg[3] = np.where(same, 0.0, 1.0)
    cnt = _cnt(ks, m, p, n).astype(float)
    ov = _ov(ks, m, p).astype(float)
    B = 2.0 * np.sum(cnt * ov * sg, axis=0)
    E = np.sum(cnt * sg * sg, axis=0)
    return A, B, E, G


def _cov_parts(lags, n_frames):
    """(4, p, p) arrays A, B, E, G divided by (N - m)(N - p), for lags in frames."""
    lags = np.asarray(lags, dtype=np.int64)
    i, j = np.triu_indices(len(lags))
    m = np.minimum(lags[i], lags[j])
    p = np.maximum(lags[i], lags[j])
    vals = np.stack(_pair_sums(m, p, int(n_frames))) / (
        (n_frames - m).astype(float) * (n_frames - p).astype(float))
    out = np.zeros((4, len(lags), len(lags)))
    out[:, i, j] = vals
    out[:, j, i] = vals
    return out


def msd_model_covariance(lags, n_frames, *, step_var_A2, noise_var_A2, excess_rate_A4=0.0,
                         n_particles=1):
    """Covariance of time-averaged MSD values of a random walk with noise.

    Model per axis a: x(t) = W(t) + e(t), W a random walk whose increments over
    one frame have variance ``step_var_A2[a]``, e independent noise of variance
    ``noise_var_A2[a]`` per frame (localisation / vibration); the total MSD sums
    the axes. A jump process adds to Cov(|Δr_a|^2, |Δr_b|^2) its fourth
    cumulant over the overlap of the two intervals, ``excess_rate_A4`` per frame
    times the overlap (zero for a Gaussian walk). Following Bullerjahn, von
    Bülow & Hummer (J. Chem. Phys. 153, 024116 (2020)); for the noise-free
    Gaussian case this reduces to Qian, Sheetz & Elson (Biophys. J. 60, 910
    (1991)). Derivation in docs/methods_diffusion.md.

    Parameters
    ----------
    lags : (p,) int
        Lags in frames, each >= 1 and < n_frames.
    n_frames : int
    step_var_A2 : float or (3,) float, Å^2
        Per-axis variance of one frame's random-walk step (2 D_a Δt).
    noise_var_A2 : float or (3,) float, Å^2
        Per-axis variance of the noise.
    excess_rate_A4 : float, Å^4 per frame
        Fourth-cumulant rate of the total displacement (jumps).
    n_particles : int
        Independent particles averaged over (divides the covariance).

    Returns
    -------
    (p, p) float, Å^4
        Covariance of the total (all-axis) MSD values at ``lags``.
    """
    parts = _cov_parts(lags, n_frames)
    return _combine(parts, np.broadcast_to(np.asarray(step_var_A2, float), (3,)),
                    np.broadcast_to(np.asarray(noise_var_A2, float), (3,)),
                    float(excess_rate_A4)) / n_particles


def _combine(parts, s2, v2, kappa):
    A, B, E, G = parts
    c = np.zeros_like(A)
    for a in range(len(s2)):
        c += 2.0 * (s2[a] ** 2 * A + s2[a] * v2[a] * B + v2[a] ** 2 * E)
    return c + kappa * G


# =========================================================================== fitting helpers
def _design(t):
    return np.column_stack([np.ones_like(t), t])


def _ols_weights(t):
    X = _design(t)
    return np.linalg.pinv(X)                      # (2, p): beta = W @ y


def _gls_weights(t, cov):
    X = _design(t)
    d = np.sqrt(np.clip(np.diag(cov), 1e-300, None))
    cn = cov / np.outer(d, d)
    for jitter in (0.0, 1e-12, 1e-9, 1e-6, 1e-3):
        try:
            cf = _la.cho_factor(cn + jitter * np.eye(len(t)), lower=True, check_finite=False)
            break
        except (np.linalg.LinAlgError, _la.LinAlgError):
            continue
    else:  # pragma: no cover - a covariance that is not positive at all
        return _ols_weights(t)
    Xs = X / d[:, None]
    ciX = _la.cho_solve(cf, Xs, check_finite=False)
    M = Xs.T @ ciX
    try:
        W = np.linalg.solve(M, ciX.T) / d[None, :]
    except np.linalg.LinAlgError:  # pragma: no cover
        return _ols_weights(t)
    return W


def _ols_fit(t, y):
    W = _ols_weights(t)
    return W @ y


def _t_quantile(p, dof):
    if dof is None or not np.isfinite(dof):
        return float(_stats.norm.ppf(p))
    return float(_stats.t.ppf(p, dof))


def _invert_model(D_hat, abc, q):
    """Interval {D : (D_hat - D)^2 <= q^2 (a D^2 + b D + c)}; (lo, hi), hi may be inf."""
    a, b, c = abc
    A = 1.0 - q * q * a
    B = -(2.0 * D_hat + q * q * b)
    C = D_hat * D_hat - q * q * c
    if A <= 0:
        disc = B * B - 4 * A * C
        if A == 0:
            lo = -C / B if B != 0 else -np.inf
        else:
            lo = (-B + math.sqrt(disc)) / (2 * A) if disc >= 0 else -np.inf
        return lo, np.inf
    disc = B * B - 4 * A * C
    if disc < 0:  # pragma: no cover - cannot happen for a, b, c >= 0
        return -np.inf, np.inf
    r = math.sqrt(disc)
    return (-B - r) / (2 * A), (-B + r) / (2 * A)


# =========================================================================== results
@dataclass(frozen=True, repr=False)
class DiffusionEstimate:
    """Diffusion coefficient of one species from one MSD curve.

    Values are in Å^2/ps and cm^2/s; ``*_stderr_*`` is the standard error and
    ``*_interval95_*`` the 95% interval (a pair). When ``is_upper_bound`` is
    True the value fields hold a one-sided 95% upper bound and the interval is
    (0, bound). When no diffusive window exists the values are NaN and
    ``message`` says why.

    Attributes
    ----------
    species : tuple of str
    reference : str
        Drift reference of the MSD.
    temperature_K : float or None
    n_ions : int
    method : str
        "gls", "ols" or "bootstrap".
    error_source : str
        Where the error bar comes from ("ion spread", "model", "ion bootstrap", "none").
    dof : float
        Degrees of freedom of the quantile (inf for normal quantiles).
    D_A2_per_ps, D_stderr_A2_per_ps, D_interval95_A2_per_ps : float, float, (2,) float
    D_cm2_per_s, D_stderr_cm2_per_s, D_interval95_cm2_per_s : float, float, (2,) float
    is_upper_bound : bool
    message : str
    fit_window_ps : (2,) float, ps
        First and last lag used.
    n_fit_lags : int
        Number of sampled lags in the window.
    window_chosen_by : str
        "automatic" or "user".
    offset_A2 : float, Å^2
        Fitted offset c of the total MSD.
    D_axes_A2_per_ps, D_axes_stderr_A2_per_ps : (3,) float
    D_axes_cm2_per_s, D_axes_stderr_cm2_per_s : (3,) float
        Per-axis diffusion coefficients (x, y, z).
    D_eigenvalues_A2_per_ps, D_eigenvalues_cm2_per_s : (3,) float
        Eigenvalues of the diffusion tensor, largest first.
    D_eigenvectors : (3, 3) float
        Columns are the principal directions.
    dimensionality : str
        "channel", "plane", "network" or "localised" (rule in the docstring of
        :func:`estimate_diffusion`).
    D_sigma_A2_per_ps, D_sigma_stderr_A2_per_ps, D_sigma_interval95_A2_per_ps
    D_sigma_cm2_per_s, D_sigma_stderr_cm2_per_s, D_sigma_interval95_cm2_per_s
        Collective (charge) diffusion coefficient from the collective MSD.
    D_sigma_is_upper_bound : bool
    seed : int or None
        Seed of the bootstrap (derived from the MSD data), if used.
    """

    species: tuple
    reference: str
    temperature_K: float | None
    n_ions: int
    method: str
    error_source: str
    dof: float
    D_A2_per_ps: float
    D_stderr_A2_per_ps: float
    D_interval95_A2_per_ps: tuple
    D_cm2_per_s: float
    D_stderr_cm2_per_s: float
    D_interval95_cm2_per_s: tuple
    is_upper_bound: bool
    message: str
    fit_window_ps: tuple
    n_fit_lags: int
    window_chosen_by: str
    offset_A2: float
    D_axes_A2_per_ps: np.ndarray
    D_axes_stderr_A2_per_ps: np.ndarray
    D_axes_cm2_per_s: np.ndarray
    D_axes_stderr_cm2_per_s: np.ndarray
    D_eigenvalues_A2_per_ps: np.ndarray
    D_eigenvalues_cm2_per_s: np.ndarray
    D_eigenvectors: np.ndarray
    dimensionality: str
    D_sigma_A2_per_ps: float
    D_sigma_stderr_A2_per_ps: float
    D_sigma_interval95_A2_per_ps: tuple
    D_sigma_cm2_per_s: float
    D_sigma_stderr_cm2_per_s: float
    D_sigma_interval95_cm2_per_s: tuple
    D_sigma_is_upper_bound: bool
    seed: int | None = None

    @property
    def has_value(self):
        """True when a number (or bound) was obtained."""
        return bool(np.isfinite(self.D_A2_per_ps))

    def to_dict(self):
        """Plain-Python dict for JSON (arrays become lists)."""
        return _as_dict(self)

    def __repr__(self):
        sp = "+".join(self.species)
        if not self.has_value:
            return f"DiffusionEstimate({sp}: no value — {self.message})"
        lo, hi = self.D_interval95_cm2_per_s
        kind = "< " if self.is_upper_bound else ""
        return (f"DiffusionEstimate({sp}: D {kind}{self.D_cm2_per_s:.3e} ± "
                f"{self.D_stderr_cm2_per_s:.2e} cm²/s (95%: {lo:.3e}–{hi:.3e}), "
                f"window {self.fit_window_ps[0]:g}–{self.fit_window_ps[1]:g} ps, "
                f"method={self.method}, {self.dimensionality}, "
                f"D_sigma {self.D_sigma_cm2_per_s:.3e} ± {self.D_sigma_stderr_cm2_per_s:.2e} cm²/s, "
                f"reference={self.reference!r})")


@dataclass(frozen=True, repr=False)
class ChargeTransportEstimate:
    """Slope of a charge-weighted collective MSD, for the conductivity.

    sigma = slope / (2 d V k_B T) with d = 3 (Nernst–Einstein form of the
    collective MSD; the conversion to S/cm belongs to the conductivity step).

    Attributes
    ----------
    slope_e2A2_per_ps, slope_stderr_e2A2_per_ps, slope_interval95_e2A2_per_ps
        Slope of < |sum q_i Δr_i|^2 > against time, e^2 Å^2/ps.
    fit_window_ps : (2,) float
    is_upper_bound : bool
    message : str
    reference : str
    temperature_K, mean_volume_A3 : float
    """

    slope_e2A2_per_ps: float
    slope_stderr_e2A2_per_ps: float
    slope_interval95_e2A2_per_ps: tuple
    fit_window_ps: tuple
    is_upper_bound: bool
    message: str
    reference: str
    temperature_K: float | None
    mean_volume_A3: float

    def to_dict(self):
        """Plain-Python dict for JSON."""
        return _as_dict(self)

    def __repr__(self):
        lo, hi = self.slope_interval95_e2A2_per_ps
        return (f"ChargeTransportEstimate(slope {self.slope_e2A2_per_ps:.4g} ± "
                f"{self.slope_stderr_e2A2_per_ps:.2g} e²Å²/ps (95%: {lo:.4g}–{hi:.4g}), "
                f"window {self.fit_window_ps[0]:g}–{self.fit_window_ps[1]:g} ps)")


# =========================================================================== window
def _model_params(t, y_axes, dt, first=None):
    """Per-axis step and noise variances of the random-walk model (Å^2 per frame).

    The step variance 2 D_a dt comes from an OLS slope over the window; the
    noise variance is half the fitted offset, but no more than the first
    sampled lag allows (MSD_a(t1) = 2 D_a t1 + 2 sigma_a^2), which keeps a
    single wandering path from inventing a huge noise.

    Parameters
    ----------
    t : (p,) float, ps
    y_axes : (p, 3) float, Å^2
    dt : float, ps
    first : (t1, (3,) MSD_a(t1)) or None
        First sampled lag and its per-axis MSD; defaults to the window's first point.
    """
    scale = max(float(np.max(np.abs(y_axes))), 1e-300)
    return _params_from_fit(_ols_fit(t, y_axes), t, y_axes, dt, scale, first)


def _params_from_fit(beta, t, y_axes, dt, scale, first=None):
    """Step and noise variances from fitted per-axis (offset, slope) ``beta`` (2, 3)."""
    s2 = np.maximum(beta[1] * dt, 1e-9 * scale)    # 2 D_a dt
    t1, y1 = (t[0], y_axes[0]) if first is None else first
    from_first = (y1 - s2 / dt * t1) / 2.0
    v2 = np.maximum(np.minimum(beta[0] / 2.0, from_first), 1e-9 * scale)
    return s2, v2


def _gls_fit_weights(t, y_axes, dt, parts, kappa, scale):
    """GLS weights of a window, with the model parameters fitted and refined once.

    Parameters
    ----------
    t : (p,) float, ps
    y_axes : (p, 3) float, Å^2
    dt : float, ps
    parts : (4, p, p) float
        ``_cov_parts`` of the window's lags.
    kappa : float, Å^4 per frame
        Fourth-cumulant rate.
    scale : float, Å^2
        Largest |MSD| of the curve (floor of the variances).

    Returns
    -------
    W : (2, p) float
        Offset and slope rows: (c, b) = W @ y.
    s2, v2 : (3,) float, Å^2
        Refined step and noise variances.
    """
    s2, v2 = _model_params(t, y_axes, dt)
    W = _gls_weights(t, _combine(parts, s2, v2, kappa))
    s2, v2 = _params_from_fit(W @ y_axes, t, y_axes, dt, scale)   # refine with GLS values
    W = _gls_weights(t, _combine(parts, s2, v2, kappa))
    return W, s2, v2


def choose_fit_window(curve, *, max_window_fraction=1 / 3, relative_tolerance=0.1,
                      slope_tolerance=0.02, z_tolerance=3.0, min_points=4,
                      drift_tolerance=0.01, drift_z=2.0, settled_z=1.0):
    """Automatic fit window on the thinned lag grid.

    The end is ``max_window_fraction`` of the run (before the poorly averaged
    tail). The start is the earliest sampled lag s that passes two tests
    (docs/methods_diffusion.md, section 2):

    *Linearity.* After fitting MSD = c + b t by least squares on [s, end],
    every sampled lag t in the early half of the window on a log scale,
    s <= t <= sqrt(s end), satisfies |MSD(t) - c - b t| <= max(z se_r(t),
    tol |b| t), and the local slope between neighbouring sampled lags there
    is within max(z se, slope_tol |b|) of b. Linearity is judged on the MSD
    minus its fitted offset, so a vibrational plateau does not count as
    sub-diffusion, while the ballistic and cage regime is skipped.

    *Settled slope.* The GLS estimate leans on the first lags of its window,
    so a slope that is still relaxing there (the cage rebound of a liquid,
    whose velocity autocorrelation goes negative, or the ballistic rise)
    biases it even when the curve looks straight. With D(s) the GLS estimate
    of the window [s, end] and s' the first sampled lag at or after 2 s, the
    drift |D(s) - D(s')| must be at most max(z_d se_drift, drift_tol D(s)).
    z_d is ``drift_z`` until some start fails this test (a drift beyond 2
    standard errors shows that a transient is present), and ``settled_z``
    from then on, so that the bias left in D is small against its error bar.
    Starts past end/4, where [s', end] would span less than a factor 2, are
    not tested (the note says so if a drift had been seen).

    The standard errors se_r, se and se_drift come from the spread of the
    same linear combination of the MSD over ions (or from the random-walk
    model when there are fewer than 2 ions or no per-ion curves). The window
    must span at least a factor 2 in time.

    Parameters
    ----------
    curve : MSDCurve
    max_window_fraction : float
        End of the window as a fraction of the run.
    relative_tolerance : float
        Allowed relative departure of MSD - c from b t.
    slope_tolerance : float
        Allowed relative departure of the local slope from b.
    z_tolerance : float
        Allowed departure in standard errors (linearity).
    min_points : int
        Sampled lags the window must hold.
    drift_tolerance : float
        Drift of D between starts s and s' that is always accepted (relative).
    drift_z, settled_z : float
        Allowed drift in standard errors, before and after a drift was found.

    Returns
    -------
    (i0, i1) : tuple of int or None
        Positions in ``curve.ion_lag_index`` of the first and last lag, or None.
    note : str
        Why no window was found; or, when no start passes every test, how the
        start was chosen instead ("" otherwise).
    """
    lag_idx = curve.ion_lag_index
    n = curve.n_frames
    dt = curve.frame_interval_ps
    end_lag = int(math.floor(max_window_fraction * (n - 1)))
    end_lag = min(end_lag, int(lag_idx[-1]) if len(lag_idx) else 0)
    inside = np.flatnonzero(lag_idx <= end_lag)
    if len(inside) < min_points:
        return None, (f"the run has {n} frames; lags up to {max_window_fraction:.2g} of it hold "
                      f"{len(inside)} sampled lags, fewer than the {min_points} a fit needs")
    i1 = int(inside[-1])
    lags_all = lag_idx[:i1 + 1]
    t = curve.lag_ps[lags_all]
    y = curve.msd_A2[lags_all]
    y_axes_all = curve.msd_axes_A2[lags_all]
    scale = float(np.max(np.abs(curve.msd_A2)))
    parts_all = _cov_parts(lags_all, n)
    per_ion = curve.has_per_ion and curve.n_ions >= 2
    if per_ion:
        y_ion = curve.ion_msd_A2[:, :i1 + 1]
    else:
        s2, v2 = _model_params(t, y_axes_all, dt)
        kappa = _excess_rate(curve, t[0], t[-1]) * dt
        cov = _combine(parts_all, s2, v2, kappa) / max(curve.n_ions, 1)

    def spread(g):
        """Standard error of g @ MSD (g of shape (k, i1 + 1) or (i1 + 1,))."""
        if per_ion:
            return (y_ion @ np.atleast_2d(g).T).std(axis=0, ddof=1) / math.sqrt(curve.n_ions)
        g = np.atleast_2d(g)
        return np.sqrt(np.clip(np.einsum("ij,jk,ik->i", g, cov, g), 0, None))

    slope_rows = {}

    def gls_slope_row(i0):
        """GLS slope weights of the window [i0, i1], padded to i1 + 1 lags."""
        if i0 not in slope_rows:
            sl = slice(i0, i1 + 1)
            kap = _excess_rate(curve, t[i0], t[i1]) * dt
            W, _, _ = _gls_fit_weights(t[sl], y_axes_all[sl], dt, parts_all[:, sl, sl], kap,
                                       max(scale, 1e-300))
            row = np.zeros(i1 + 1)
            row[sl] = W[1]
            slope_rows[i0] = row
        return slope_rows[i0]

    best = (np.inf, None)              # least departing start (single path)
    least_drift = (np.inf, None)       # linear start with the least drift
    z_drift = drift_z
    for i0 in range(0, i1 - min_points + 2):
        if t[i1] < 2.0 * t[i0]:
            break
        m = i1 + 1 - i0
        sl = slice(i0, i1 + 1)
        W = _ols_weights(t[sl])
        c, b = W @ y[sl]
        R = np.zeros((m, i1 + 1))
        R[:, sl] = np.eye(m) - _design(t[sl]) @ W          # residual operator
        se = spread(R)
        resid = np.abs(y[sl] - c - b * t[sl])
        tol = np.maximum(z_tolerance * se, relative_tolerance * abs(b) * t[sl])
        early = t[sl] <= math.sqrt(t[i0] * t[i1]) * (1 + 1e-12)
        early[:2] = True
        # local slopes between neighbouring sampled lags of the early part against b
        ne = int(early.sum())
        G = np.zeros((ne, i1 + 1))
        for r in range(ne):
            w = 1.0 / (t[i0 + r + 1] - t[i0 + r])
            G[r, i0 + r], G[r, i0 + r + 1] = -w, w
        G[:, sl] -= W[1][None, :]                           # local slope minus fitted slope
        se_g = spread(G)
        dev_g = np.abs(G @ y)
        tol_g = np.maximum(z_tolerance * se_g, slope_tolerance * abs(b))
        ratio = np.concatenate([(resid / np.maximum(tol, 1e-300))[early],
                                dev_g / np.maximum(tol_g, 1e-300)])
        worst = float(np.max(ratio))
        note = ""
        if worst <= 1.0 + 1e-9 and scale > 0:
            # settled slope: D(s) against D(s'), s' = 2 s, same end; testable while [s', end]
            # still spans a factor 2
            j = int(np.searchsorted(t, 2.0 * t[i0] * (1 - 1e-12)))
            if t[i1] < 2.0 * t[min(j, i1)] or j > i1 - min_points + 1:
                if least_drift[1] is not None:
                    note = (f"the slope of the MSD was still drifting at a start of "
                            f"{t[least_drift[1]]:.3g} ps (D from [s, end] against D from "
                            f"[2s, end]); the window starts at the first start past end/4, where "
                            "the drift can no longer be tested: treat D with care")
            else:
                h0 = gls_slope_row(i0)
                g = h0 - gls_slope_row(j)
                drift = abs(float(g @ y))
                allowed = max(z_drift * float(spread(g)[0]), drift_tolerance * abs(float(h0 @ y)))
                r_drift = drift / max(allowed, 1e-300)
                if r_drift > 1.0 + 1e-9:
                    z_drift = settled_z                     # a transient is present
                    if r_drift < least_drift[0]:
                        least_drift = (r_drift, i0)
                worst = max(worst, r_drift)
        if worst <= 1.0 + 1e-9:
            return (i0, i1), note
        if worst < best[0]:
            best = (worst, i0)
    if least_drift[1] is not None:
        return (least_drift[1], i1), (
            "the slope of the MSD still drifts at every linear start up to end/4 (D from "
            "[s, end] differs from D from [2s, end] by more than its standard error); the "
            f"window starts where it drifts least ({least_drift[0]:.2g} x the tolerance): "
            "treat D with care")
    if not per_ion and best[1] is not None:
        return (best[1], i1), ("a single path (no spread over ions) cannot confirm linearity at "
                               f"{z_tolerance:g} standard errors; the window starts where it "
                               f"departs least (worst residual {best[0]:.2g} x the tolerance)")
    return None, ("no window of sampled lags, spanning at least a factor 2 in time and ending at "
                  f"{max_window_fraction:.2g} of the run, is linear after removing its offset "
                  "(the run may be too short to leave the ballistic/vibrational regime)")


def _user_window(curve, window):
    try:
        t0, t1 = (float(window[0]), float(window[1]))
    except (TypeError, ValueError, IndexError):
        raise UsageError(f"window must be a pair (start_ps, end_ps), got {window!r}") from None
    t = curve.ion_lag_ps
    if not (0 <= t0 < t1):
        raise UsageError(f"window must satisfy 0 <= start < end; got {t0:g}–{t1:g} ps")
    if t1 > curve.lag_ps[-1] * (1 + 1e-9):
        raise UsageError(f"window end {t1:g} ps is beyond the longest lag of the MSD "
                         f"({curve.lag_ps[-1]:g} ps); compute the MSD with a larger "
                         "max_lag_fraction or shorten the window")
    tol = 1e-9 * max(t1, 1e-300)
    sel = np.flatnonzero((t >= t0 - tol) & (t <= t1 + tol))
    if len(sel) < 3:
        raise UsageError(f"window {t0:g}–{t1:g} ps holds {len(sel)} sampled lags, a fit needs 3; "
                         f"sampled lags near it: {np.round(t[:12], 6).tolist()} ... ps")
    return int(sel[0]), int(sel[-1])


# =========================================================================== core
def _hash_seed(curve):
    h = hashlib.sha256()
    for arr in (curve.lag_ps, curve.msd_A2, curve.ion_msd_A2):
        if arr is not None:
            h.update(np.ascontiguousarray(arr, dtype=np.float64).tobytes())
    return int.from_bytes(h.digest()[:8], "little")


def _excess_rate(curve, t_lo, t_hi):
    """Fourth-cumulant rate of the total displacement, Å^4/ps (>= 0), from <r^4>.

    excess(t) = <r^4> - [(tr M)^2 + 2 M:M] (M the MSD tensor) vanishes for a
    Gaussian displacement and equals kappa t for a jump process.
    """
    if curve.msd4_A4 is None or len(curve.alpha2_lag_index) == 0:
        return 0.0
    t_all = curve.alpha2_lag_ps
    inside = np.flatnonzero((t_all >= t_lo * (1 - 1e-9)) & (t_all <= t_hi * (1 + 1e-9)))
    if len(inside) == 0:
        return 0.0
    lags = curve.alpha2_lag_index[inside]
    t = t_all[inside]
    if curve.msd_tensor_A2 is not None:
        M = curve.msd_tensor_A2[lags]
        gauss = np.trace(M, axis1=1, axis2=2) ** 2 + 2.0 * np.einsum("kab,kab->k", M, M)
    else:
        M = curve.msd_axes_A2[lags]
        gauss = M.sum(axis=1) ** 2 + 2.0 * (M * M).sum(axis=1)
    excess = curve.msd4_A4[inside] - gauss
    # the short lags of the window hold the most origins per jump: estimate kappa there
    # (median of excess / t over the first tenth of the window, at least 3 lags)
    short = (t > 0) & (t <= max(t[min(2, len(t) - 1)], t_lo + 0.1 * (t_hi - t_lo)))
    ok = np.isfinite(excess) & short
    if not np.any(ok):
        return 0.0
    return max(0.0, float(np.median(excess[ok] / t[ok])))


def _nan_estimate(curve, method, message, window=(math.nan, math.nan), by="automatic", n_lags=0):
    nan3 = np.full(3, np.nan)
    nan2 = (math.nan, math.nan)
    return DiffusionEstimate(
        species=curve.species, reference=curve.reference, temperature_K=curve.temperature_K,
        n_ions=curve.n_ions, method=method, error_source="none", dof=math.nan,
        D_A2_per_ps=math.nan, D_stderr_A2_per_ps=math.nan, D_interval95_A2_per_ps=nan2,
        D_cm2_per_s=math.nan, D_stderr_cm2_per_s=math.nan, D_interval95_cm2_per_s=nan2,
        is_upper_bound=False, message=message, fit_window_ps=tuple(window), n_fit_lags=n_lags,
        window_chosen_by=by, offset_A2=math.nan, D_axes_A2_per_ps=nan3,
        D_axes_stderr_A2_per_ps=nan3, D_axes_cm2_per_s=nan3, D_axes_stderr_cm2_per_s=nan3,
        D_eigenvalues_A2_per_ps=nan3, D_eigenvalues_cm2_per_s=nan3,
        D_eigenvectors=np.full((3, 3), np.nan), dimensionality="unknown",
        D_sigma_A2_per_ps=math.nan, D_sigma_stderr_A2_per_ps=math.nan,
        D_sigma_interval95_A2_per_ps=nan2, D_sigma_cm2_per_s=math.nan,
        D_sigma_stderr_cm2_per_s=math.nan, D_sigma_interval95_cm2_per_s=nan2,
        D_sigma_is_upper_bound=False)


class _Slope:
    """One fitted slope: value, stderr, interval, bound flag (all in the curve's units / (2d))."""

    def __init__(self, value, stderr, lo, hi, dof, source):
        self.value, self.stderr, self.lo, self.hi = value, stderr, lo, hi
        self.dof, self.source = dof, source
        self.is_upper_bound = False
        self.note = ""

    def bound_if_unresolved(self, upper95):
        """Turn into a one-sided 95% upper bound when the interval reaches zero."""
        if not (self.lo > 0 and self.value > 0):
            self.is_upper_bound = True
            self.value = max(float(upper95), 0.0)
            self.lo, self.hi = 0.0, self.value
        return self


def _model_abc(h, parts, s2_shape, v2, kappa_per_D, dt, n_particles, factor):
    """v(D) = a D^2 + b D + c for the estimator D = factor * h.y under the model."""
    A, B, E, G = (h @ p @ h for p in parts)
    a = sum(2.0 * (2.0 * s2_shape[i] * dt) ** 2 * A for i in range(len(v2)))
    b = sum(2.0 * (2.0 * s2_shape[i] * dt) * v2[i] * B for i in range(len(v2))) \
        + kappa_per_D * dt * G
    c = sum(2.0 * v2[i] ** 2 * E for i in range(len(v2)))
    f2 = factor * factor / n_particles
    return a * f2, b * f2, c * f2


def estimate_diffusion(msd_curve, *, window=None, method="gls", max_window_fraction=1 / 3,
                       min_ions_for_spread=2, dimension_threshold=0.1, n_bootstrap=2000,
                       relative_tolerance=0.1, z_tolerance=3.0, n_time_blocks=8,
                       collective_error="blocks"):
    """Diffusion coefficient with a calibrated 95% interval from an MSD curve.

    Parameters
    ----------
    msd_curve : MSDCurve
        From :func:`diffkit.compute_msd`.
    window : (float, float) or None, ps
        Fit window (first and last lag). None chooses it (see
        :func:`choose_fit_window`); the window is always reported.
    method : {"gls", "ols", "bootstrap"}
        Estimator and error route (module docstring).
    max_window_fraction : float
        End of the automatic window as a fraction of the run (default 1/3).
    min_ions_for_spread : int
        Fewest ions (>= 2) for the ion-spread error; below it a single ion uses
        time blocks, several ions the model covariance.
    dimension_threshold : float
        Dimensionality rule: a principal direction of the diffusion tensor
        conducts when its eigenvalue is at least this fraction of the largest.
        The label is "channel" (1 conducting direction), "plane" (2) or
        "network" (3); "localised" when D is only an upper bound.
    n_bootstrap : int
        Resamples for ``method="bootstrap"``.
    relative_tolerance, z_tolerance : float
        Linearity tolerances of the automatic window.
    n_time_blocks : int
        Blocks for the time-blocking error of one path (single ion, collective).
    collective_error : {"blocks", "model"}
        Error route of ``D_sigma``.

    Returns
    -------
    DiffusionEstimate
        A run too short for a diffusive window gives NaN values and a message;
        ions that do not move measurably give ``is_upper_bound=True``.
    """
    if not isinstance(msd_curve, MSDCurve):
        raise UsageError(f"estimate_diffusion needs an MSDCurve from compute_msd, "
                         f"got {type(msd_curve).__name__}")
    if method not in METHODS:
        raise UsageError(f"method must be one of {', '.join(METHODS)}; got {method!r}")
    if not (0 < max_window_fraction <= 1):
        raise UsageError(f"max_window_fraction must be in (0, 1], got {max_window_fraction}")
    if collective_error not in ("blocks", "model"):
        raise UsageError(f"collective_error must be 'blocks' or 'model'; got {collective_error!r}")
    if int(n_time_blocks) < 4:
        raise UsageError(f"n_time_blocks must be at least 4, got {n_time_blocks}")
    if not (0 <= dimension_threshold < 1):
        raise UsageError(f"dimension_threshold must be in [0, 1), got {dimension_threshold}")
    curve = msd_curve
    notes = []
    if window is None:
        win, reason = choose_fit_window(curve, max_window_fraction=max_window_fraction,
                                        relative_tolerance=relative_tolerance,
                                        z_tolerance=z_tolerance)
        if win is None:
            return _nan_estimate(curve, method, "no diffusion coefficient: " + reason)
        by = "automatic"
        if reason:
            notes.append(reason)
    else:
        win = _user_window(curve, window)
        by = "user"
    i0, i1 = win
    sel = np.arange(i0, i1 + 1)
    lags = curve.ion_lag_index[sel]
    t = curve.lag_ps[lags]
    dt = curve.frame_interval_ps
    n = curve.n_frames
    y = curve.msd_A2[lags]
    y_axes = curve.msd_axes_A2[lags]
    win_ps = (float(t[0]), float(t[-1]))
    scale = float(np.max(np.abs(curve.msd_A2)))

    if scale == 0.0:  # not a single displacement: frozen atoms
        return _frozen(curve, method, win_ps, by, len(sel))

    # -- model covariance and weights ------------------------------------------
    parts = _cov_parts(lags, n)
    s2, v2 = _model_params(t, y_axes, dt)
    kappa = _excess_rate(curve, t[0], t[-1]) * dt     # Å^4 per frame
    if method == "ols":
        W = _ols_weights(t)
    else:
        W, s2, v2 = _gls_fit_weights(t, y_axes, dt, parts, kappa, scale)
    h = W[1]
    offset = float(W[0] @ y)
    D_hat = float(h @ y) / (2 * _DIM)
    # s2_a = 2 D_a dt = 2 (D_a/D) D dt; _model_abc expects shape[a] = D_a / D
    shape = s2 / max(float(s2.mean()), 1e-300)
    kappa_per_D = (kappa / dt) / max(D_hat, 1e-300) if D_hat > 0 else 0.0

    seed = None
    use_spread = curve.has_per_ion and curve.n_ions >= max(2, min_ions_for_spread)
    start_lag = int(lags[0])
    if use_spread:
        per_ion = curve.ion_msd_A2[:, sel] @ h / (2 * _DIM)            # (n_ions,)
        if method == "bootstrap" and curve.n_ions < 5:
            notes.append(f"bootstrap over {curve.n_ions} ions is meaningless; "
                         "used the ion spread with a Student t quantile")
        if method == "bootstrap" and curve.n_ions >= 5:
            seed = _hash_seed(curve)
            rng = np.random.default_rng(seed)
            draws = rng.integers(0, curve.n_ions, size=(int(n_bootstrap), curve.n_ions))
            boot = per_ion[draws].mean(axis=1)
            se = float(boot.std(ddof=1))
            lo, hi = (float(v) for v in np.quantile(boot, [0.025, 0.975]))
            up = float(np.quantile(boot, 0.95))
            tr = _Slope(D_hat, se, lo, hi, math.inf, "ion bootstrap")
        else:
            se = float(per_ion.std(ddof=1) / math.sqrt(curve.n_ions))
            dof = float(curve.n_ions - 1)
            q = _t_quantile(0.975, dof)
            tr = _Slope(D_hat, se, D_hat - q * se, D_hat + q * se, dof, "ion spread")
            up = D_hat + _t_quantile(0.95, dof) * se
        tr.bound_if_unresolved(up)
        if curve.n_ions < 10:
            notes.append(f"the error bar rests on {curve.n_ions} ions (Student t with "
                         f"{curve.n_ions - 1} degrees of freedom): expect a wide interval")
    else:
        tr = None
        if curve.n_ions == 1:
            tr = _blocked_estimate(curve.summed_displacement_A, start_lag, dt,
                                   _BLOCK_WINDOW_FRACTION, n_time_blocks)
            if tr is not None:
                notes.append(f"the error bar rests on a single ion: D and its error come from "
                             f"{tr.source} of its path (Student t)")
        if tr is None:
            abc = _model_abc(h, parts, shape, v2, kappa_per_D, dt, curve.n_ions, 1.0 / (2 * _DIM))
            tr = _model_slope(D_hat, abc)
            if curve.n_ions == 1:
                notes.append("the error bar rests on a single ion and the run is too short for "
                             "time blocks: it comes from the random-walk model covariance")
            elif not curve.has_per_ion:
                notes.append("no per-ion curves: the error bar comes from the random-walk model "
                             "covariance (less reliable with few hops)")
            else:
                notes.append(f"the error bar comes from the random-walk model covariance "
                             f"(min_ions_for_spread={min_ions_for_spread})")
        if method == "bootstrap":
            notes.append("a bootstrap over ions needs per-ion curves of at least 5 ions; "
                         "not used")

    # -- per axis ---------------------------------------------------------------
    D_axes = np.full(3, np.nan)
    se_axes = np.full(3, np.nan)
    for a in range(3):
        if method == "ols":
            wa = _ols_weights(t)[1]
        else:
            wa = _gls_weights(t, _combine(parts, s2[a:a + 1], v2[a:a + 1], kappa / 3.0))[1]
        D_axes[a] = float(wa @ y_axes[:, a]) / 2.0
        # per-axis errors from the model covariance (per-ion curves are kept for the total only)
        var = wa @ (_combine(parts, s2[a:a + 1], v2[a:a + 1], kappa / 3.0) / curve.n_ions) @ wa
        se_axes[a] = math.sqrt(max(var, 0.0)) / 2.0

    # -- tensor and dimensionality -------------------------------------------------
    if curve.msd_tensor_A2 is not None:
        Dt = np.einsum("k,kab->ab", h, curve.msd_tensor_A2[lags]) / 2.0
    else:
        Dt = np.diag(np.einsum("k,ka->a", h, y_axes) / 2.0)
    Dt = 0.5 * (Dt + Dt.T)
    evals, evecs = np.linalg.eigh(Dt)
    order = np.argsort(evals)[::-1]
    evals, evecs = evals[order], evecs[:, order]
    if tr.is_upper_bound:
        dim = DIMENSIONALITY_LABELS[0]
    else:
        n_dim = int(np.sum(evals >= dimension_threshold * evals[0])) if evals[0] > 0 else 0
        dim = DIMENSIONALITY_LABELS[n_dim]
        cut = dimension_threshold * evals[0]
        se_eval = np.sqrt((evecs ** 2).T @ np.nan_to_num(se_axes) ** 2)  # axis errors, rotated
        if np.any(np.abs(evals[1:] - cut) < 2.0 * se_eval[1:]):
            notes.append(f"the dimensionality label ({dim}) is uncertain: an eigenvalue of the "
                         "diffusion tensor lies within 2 standard errors of the threshold")

    # -- collective ------------------------------------------------------------------
    col = None
    if collective_error == "blocks":
        col = _blocked_estimate(curve.summed_displacement_A, start_lag, dt, _BLOCK_WINDOW_FRACTION,
                                n_time_blocks, scale=1.0 / curve.n_ions)
        if col is None:
            notes.append("the run is too short for time blocks of the collective MSD; "
                         "D_sigma's error comes from the random-walk model")
    if col is None:
        yc = curve.collective_A2[lags]
        Dc_hat = float(h @ yc) / (2 * _DIM)
        # one path: the summed displacement over sqrt(n) has the noise of one ion and, for
        # independent ions, 1/n of the fourth-cumulant rate
        abc_c = _model_abc(h, parts, shape, v2, kappa_per_D / max(curve.n_ions, 1), dt, 1,
                           1.0 / (2 * _DIM))
        col = _model_slope(Dc_hat, abc_c)

    if tr.is_upper_bound:
        notes.insert(0, "the ions did not move measurably within the window: D is a one-sided "
                        "95% upper bound, not a measured value")
    if col.is_upper_bound and not tr.is_upper_bound:
        notes.append("the collective MSD does not resolve D_sigma: it is a one-sided 95% upper bound")
    if col.hi == np.inf:
        notes.append("the collective MSD is too noisy for a finite upper end of its 95% interval")
    if curve.n_ions == 1:
        notes.append("with one ion the collective MSD is the tracer MSD")

    conv = a2ps_to_cm2s
    return DiffusionEstimate(
        species=curve.species, reference=curve.reference, temperature_K=curve.temperature_K,
        n_ions=curve.n_ions, method=method, error_source=tr.source, dof=float(tr.dof),
        D_A2_per_ps=float(tr.value), D_stderr_A2_per_ps=float(tr.stderr),
        D_interval95_A2_per_ps=(float(tr.lo), float(tr.hi)),
        D_cm2_per_s=float(conv(tr.value)), D_stderr_cm2_per_s=float(conv(tr.stderr)),
        D_interval95_cm2_per_s=(float(conv(tr.lo)), float(conv(tr.hi))),
        is_upper_bound=bool(tr.is_upper_bound), message="; ".join(notes),
        fit_window_ps=win_ps, n_fit_lags=len(sel), window_chosen_by=by, offset_A2=offset,
        D_axes_A2_per_ps=D_axes, D_axes_stderr_A2_per_ps=se_axes,
        D_axes_cm2_per_s=conv(D_axes), D_axes_stderr_cm2_per_s=conv(se_axes),
        D_eigenvalues_A2_per_ps=evals, D_eigenvalues_cm2_per_s=conv(evals), D_eigenvectors=evecs,
        dimensionality=dim,
        D_sigma_A2_per_ps=float(col.value), D_sigma_stderr_A2_per_ps=float(col.stderr),
        D_sigma_interval95_A2_per_ps=(float(col.lo), float(col.hi)),
        D_sigma_cm2_per_s=float(conv(col.value)), D_sigma_stderr_cm2_per_s=float(conv(col.stderr)),
        D_sigma_interval95_cm2_per_s=(float(conv(col.lo)), float(conv(col.hi))),
        D_sigma_is_upper_bound=bool(col.is_upper_bound), seed=seed)


def _block_slope(track, start_lag, dt, max_window_fraction, n_blocks, weights="ols"):
    """Time blocking of one path: D from each of ``n_blocks`` consecutive blocks.

    Parameters
    ----------
    track : (n_frames, 3) float, Å
        One path (a single ion, or the summed displacement of many).
    start_lag : int
        First lag of the fit window, frames.
    dt : float, ps
    max_window_fraction : float
        End of each block's window as a fraction of the block.
    n_blocks : int

    Returns
    -------
    (n_blocks,) float or None
        D (in the path's units per ps / 6) of each block; None when a block is
        too short for a window starting at ``start_lag``.
    """
    n = track.shape[0]
    length = n // n_blocks
    end = int(math.floor(max_window_fraction * (length - 1)))
    if end < 2 * start_lag:
        return None
    grid = thinned_lags(end)
    lags = grid[grid >= start_lag]
    if len(lags) < 3:
        return None
    t = lags * dt
    h = _ols_weights(t)[1]
    out = np.empty(n_blocks)
    for b in range(n_blocks):
        seg = track[b * length:(b + 1) * length]
        out[b] = float(h @ _msd_of_track(seg, end).sum(axis=1)[lags]) / (2 * _DIM)
    return out


def _blocked_estimate(track, start_lag, dt, max_window_fraction, n_blocks, scale=1.0):
    """Mean of block D values with a Student-t interval, or None if blocks are too short."""
    for nb in range(n_blocks, 3, -1):
        vals = _block_slope(track, start_lag, dt, max_window_fraction, nb)
        if vals is not None:
            vals = vals * scale
            D = float(vals.mean())
            se = float(vals.std(ddof=1) / math.sqrt(nb))
            dof = float(nb - 1)
            q = _t_quantile(0.975, dof)
            s = _Slope(D, se, D - q * se, D + q * se, dof, f"time blocks ({nb})")
            s.bound_if_unresolved(D + _t_quantile(0.95, dof) * se)
            return s
    return None


def _model_slope(D_hat, abc):
    """Model-based stderr at D_hat and the inverted 95% interval / upper bound."""
    a, b, c = abc
    var = a * max(D_hat, 0.0) ** 2 + b * max(D_hat, 0.0) + c
    se = math.sqrt(max(var, 0.0))
    q = float(_stats.norm.ppf(0.975))
    lo, hi = _invert_model(D_hat, abc, q)
    s = _Slope(D_hat, se, lo, hi, math.inf, "model")
    _, up = _invert_model(D_hat, abc, float(_stats.norm.ppf(0.95)))
    s.bound_if_unresolved(up)
    return s


def _frozen(curve, method, win_ps, by, n_lags):
    est = _nan_estimate(curve, method, "", win_ps, by, n_lags)
    zero3 = np.zeros(3)
    return dataclasses.replace(
        est, D_A2_per_ps=0.0, D_stderr_A2_per_ps=0.0, D_interval95_A2_per_ps=(0.0, 0.0),
        D_cm2_per_s=0.0, D_stderr_cm2_per_s=0.0, D_interval95_cm2_per_s=(0.0, 0.0),
        is_upper_bound=True, error_source="none", offset_A2=0.0,
        message="the atoms never moved (MSD identically zero): D is reported as the bound 0",
        D_axes_A2_per_ps=zero3, D_axes_stderr_A2_per_ps=zero3, D_axes_cm2_per_s=zero3,
        D_axes_stderr_cm2_per_s=zero3, D_eigenvalues_A2_per_ps=zero3,
        D_eigenvalues_cm2_per_s=zero3, D_eigenvectors=np.eye(3), dimensionality="localised",
        D_sigma_A2_per_ps=0.0, D_sigma_stderr_A2_per_ps=0.0, D_sigma_interval95_A2_per_ps=(0.0, 0.0),
        D_sigma_cm2_per_s=0.0, D_sigma_stderr_cm2_per_s=0.0,
        D_sigma_interval95_cm2_per_s=(0.0, 0.0), D_sigma_is_upper_bound=True)


def estimate_charge_transport(charge_curve, *, window, n_time_blocks=8):
    """Slope of a charge-weighted collective MSD with a 95% interval.

    The curve is a single path, so the error comes from time blocks of the
    charge-weighted displacement (as for ``D_sigma``, see
    docs/methods_diffusion.md); runs too short for blocks fall back to the
    random-walk plus noise model covariance of one path.

    Parameters
    ----------
    charge_curve : ChargeMSDCurve
    window : (float, float), ps
        Fit window, usually the tracer estimate's ``fit_window_ps``; its start
        also starts each block's window.
    n_time_blocks : int

    Returns
    -------
    ChargeTransportEstimate
    """
    if not isinstance(charge_curve, ChargeMSDCurve):
        raise UsageError("estimate_charge_transport needs a ChargeMSDCurve from compute_charge_msd")
    try:
        t0, t1 = float(window[0]), float(window[1])
    except (TypeError, ValueError, IndexError):
        raise UsageError(f"window must be a pair (start_ps, end_ps), got {window!r}") from None
    if not (0 < t0 < t1 <= charge_curve.lag_ps[-1] * (1 + 1e-9)):
        raise UsageError(f"window {t0:g}–{t1:g} ps must satisfy 0 < start < end <= "
                         f"{charge_curve.lag_ps[-1]:g} ps")
    dt = charge_curve.frame_interval_ps
    all_lags = thinned_lags(len(charge_curve.lag_ps) - 1)
    lags = all_lags[(all_lags * dt >= t0 * (1 - 1e-9)) & (all_lags * dt <= t1 * (1 + 1e-9))]
    if len(lags) < 3:
        raise UsageError(f"window {t0:g}–{t1:g} ps holds {len(lags)} sampled lags, a fit needs 3")
    f = 2 * _DIM
    s = _blocked_estimate(charge_curve.charge_displacement_eA, int(lags[0]), dt,
                          _BLOCK_WINDOW_FRACTION, int(n_time_blocks))
    how = "time blocks"
    t = lags * dt
    if s is None:
        how = "model"
        y_axes = charge_curve.charge_msd_axes_e2A2[lags]
        y = charge_curve.charge_msd_e2A2[lags]
        parts = _cov_parts(lags, charge_curve.n_frames)
        s2, v2 = _model_params(t, y_axes, dt)
        h = _gls_weights(t, _combine(parts, s2, v2, 0.0))[1]
        shape = s2 / max(float(s2.mean()), 1e-300)
        abc = _model_abc(h, parts, shape, v2, 0.0, dt, 1, 1.0 / f)
        s = _model_slope(float(h @ y) / f, abc)
    msg = f"error from {s.source if how == 'time blocks' else 'the random-walk model'}"
    if s.is_upper_bound:
        msg = "the slope is not resolved from zero: one-sided 95% upper bound; " + msg
    return ChargeTransportEstimate(
        slope_e2A2_per_ps=s.value * f, slope_stderr_e2A2_per_ps=s.stderr * f,
        slope_interval95_e2A2_per_ps=(s.lo * f, s.hi * f), fit_window_ps=(float(t[0]), float(t[-1])),
        is_upper_bound=s.is_upper_bound, message=msg, reference=charge_curve.reference,
        temperature_K=charge_curve.temperature_K, mean_volume_A3=charge_curve.mean_volume_A3)
