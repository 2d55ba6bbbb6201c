"""Hop census: when, where and how far the mobile ions jumped.

Two methods, both streaming over blocks of atoms (:meth:`Trajectory.iter_atom_blocks`):

``method="displacement"`` (default, needs no sites)
    1. *Tracker.* Each ion's path is smoothed with a short running median
       (edge preserving, so a step stays a step) and followed frame by frame
       against a *resting place* (the running mean of the smoothed positions of
       the current stay). A hop is counted when the smoothed position settles —
       for ``settle_frames`` consecutive frames, close to each other — more
       than ``threshold_A`` away from the resting place.
    2. *One-frame stays* (automatic settings, when the tracker needed
       smoothing). The tracker's stays are checked on the raw positions: a stay
       of L frames stands when its raw mean lies farther than R/√L from the
       places before and after it, else it joins the one it is close to; each
       hop is re-timed to the least-squares change point between the two
       places; and a raw frame farther than R (``excursion_radius_A``) from the
       place it is assigned to starts a short stay of its own — kept, even one
       frame long, when it lies more than ``threshold_A`` from the places
       before and after it.

``method="sites"``
    Sites are the peaks of the time-averaged density of the mobile species on
    a periodic grid (Gaussian-smoothed histogram of wrapped positions, peaks
    closer than the threshold merged, centres refined by centroids). With
    hysteresis: a position moves the ion to a site only inside that site's
    *core*; outside every core the previous site is kept, so rattling at a
    boundary is not a hop. With automatic settings every raw frame is assigned
    and the core radius is the largest (at most min(d_nn − θ, 0.45 d_nn)) for
    which vibration is expected to put an ion inside a neighbour's core rarely
    enough (non-central χ² with 3 degrees of freedom); a visit of one frame
    counts. Each hop is timed at the first of the frames just before the entry
    that were already nearer the new site than the old one. Reports site
    occupancies and site-to-site hop counts.

Automatic settings (each reported in the result):

* Vibration *span* (``vibration_span_frames``): the lag from which robust
  differences of positions that many frames apart stop growing. It is the
  shortest lag tried (≈ 0.05 ps) for vibration independent from frame to
  frame; for vibration correlated in time (MD saved every few fs) it is about
  half a period or more, and then the scouting blocks span it, the provisional
  threshold uses the plateau rms, the one-frame rules count separate
  excursions rather than frames (Rice's upcrossing rate, with ρ1 =
  ``vibration_step_correlation``), a stay counts as L/span independent frames,
  the tracker's first resting place averages over 4 spans, and the site
  method walks a hop back up to 4 spans. Lags that grow because ions hop
  (many steps too large for vibration within a span) are not a span.

* ``threshold_A`` θ = ``threshold_fraction`` (0.6) × the typical shortest
  distance between distinct resting places seen. A coarse scouting pass
  (paths block-medianed over ~0.1 ps, followed with a provisional threshold of
  4 × the vibration rms) finds stays; the distances between consecutive stays
  that both last ≥ 3 blocks are the candidate lengths (with fewer than 10 of
  them, the nearest distances between different ions' resting places join
  in); the typical shortest is the median of the candidates ≤ 1.25 × their
  10th percentile.
* The tracker's running-median width and ``settle_frames`` are the finest
  pair, in the order (1, 1), (3, 2), (5, 2), (7, 2), ..., for which vibration
  alone is expected to cause fewer than 0.1 false hops in the whole run:
  n_ion_frames × P(|g| > reach / s_w) (× 2 with ``settle_frames=1``), g a
  3-vector of unit Gaussians and s_w the noise of the smoothed path measured
  inside long stays.
* The one-frame rules accept an expected ``false_hop_allowance`` hops from
  vibration over the run: 0.02, or 1 % of the hops the scouting pass saw
  (an undercount of the true hops) where that is more. R solves
  2 · n_ion_frames · P(|g| > R/σ) = allowance; the site core radius solves
  the same with the non-central χ² probability of landing in a neighbour's
  core. The time resolution is then one frame (``time_resolution_ps``).

The effective number of hops is N_eff = Σ_i |R_i(end) − R_i(start)|² / a², with
R the resting place (or site) of ion i and a the mean jump distance (He, Zhu,
Epstein & Mo, npj Comput. Mater. 4, 18 (2018)); resting places rather than raw
positions keep vibration (≈ 6σ² per ion) out of it.

See docs/methods_hops_and_verdict.md for the equations and thresholds.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import ndimage as _ndi
from scipy import spatial as _spatial
from scipy import stats as _stats

from .errors import InputError, UsageError
from .results import to_plain
from .unwrap import cell_heights

__all__ = ["HopSummary", "SiteCensus", "count_hops", "HOP_METHODS"]

#: Accepted values of ``method=``.
HOP_METHODS = ("displacement", "sites")

#: Default threshold as a fraction of the shortest distance between resting places.
DEFAULT_THRESHOLD_FRACTION = 0.6
#: Scouting: a resting place is distinct when more than this many vibration rms away.
_SCOUT_Z = 4.0
#: Scouting block length, ps (about one vibrational period), and minimum in frames.
_SCOUT_BLOCK_PS = 0.1
_SCOUT_BLOCK_MIN = 4
#: Vibration span: lag differences whose variance still rises by more than this
#: factor when the lag doubles are taken as still correlated.
_SPAN_RISE = 1.15
#: A span is vibration only where an ion makes fewer steps too large for
#: vibration than this within it (else the lags grow because of hops).
_SPAN_MAX_HOPS = 0.5
#: A step between consecutive frames is too large for vibration beyond this many
#: per-axis rms of such steps (3-D length).
_BIG_STEP_Z = 8.0
#: Ions and frames of the first block used to measure the vibration span.
_SPAN_SAMPLE_IONS = 64
_SPAN_SAMPLE_FRAMES = 50_000
#: Longest lag tried for the vibration span, frames (and at most 1/16 of the run).
_SPAN_MAX_LAG = 1024
#: Running-median windows tried, finest first.
_WINDOWS = (1, 3, 5, 7, 9, 13, 17, 25, 37, 51, 75, 101)
#: Expected hops caused by vibration alone over the whole run that the automatic
#: resolution of the smoothed-path tracker accepts.
_FALSE_HOP_BUDGET = 0.1
#: Expected false hops the one-frame rules may add in a run with few hops.
_FALSE_HOP_FLOOR = 0.02
#: Share of the hops seen while scouting that the one-frame rules may add as
#: expected false hops (a run where scouting saw few hops keeps _FALSE_HOP_FLOOR).
_FALSE_HOP_SHARE = 0.01
#: Sites: raw frames are assigned without smoothing when the core radius the
#: allowance permits is at least this many vibration rms (a frame of a stay then
#: lands in the core with probability ≥ 0.48).
_MIN_CORE_SIGMAS = 1.5
#: Sites: a hop moves back over at most this many frames already nearer the new site.
_WALK_BACK_FRAMES = 8
#: ... and at least this many vibration spans (correlated vibration, see _vibration_span).
_WALK_BACK_SPANS = 4
#: Correlated vibration: the tracker's first resting place of each ion averages
#: over at least this many vibration spans (about two periods).
_FIRST_ANCHOR_SPANS = 4
#: The resting place is the mean of at most this many latest frames of the stay.
_ANCHOR_MEMORY = 200
#: Ions and frames used to measure the smoothed-path noise.
_NOISE_SAMPLE_IONS = 32
_NOISE_SAMPLE_FRAMES = 20_000
#: Largest number of wrapped positions histogrammed for the site density.
_DENSITY_POINTS = 2_000_000
#: Largest number of grid bins of the site density.
_DENSITY_MAX_BINS = 4_000_000


# =========================================================================== results
@dataclass(frozen=True, eq=False, repr=False)
class SiteCensus:
    """Sites of the mobile species and the traffic between them (``method="sites"``).

    Attributes
    ----------
    site_positions_A : (n_sites, 3) float, Å
        Site centres, Cartesian, in the mean cell.
    core_radius_A : float, Å
        Radius inside which a position is assigned to a site.
    nearest_site_distance_A : float, Å
        Typical (10th percentile) distance from a site to its nearest neighbour.
    site_occupancy : (n_sites,) float
        Mean number of ions assigned to each site over the run.
    pair_from_site, pair_to_site : (n_pairs,) int
        Site pairs with at least one hop, from → to.
    pair_hops : (n_pairs,) int
        Number of hops from ``pair_from_site`` to ``pair_to_site``.
    hop_from_site, hop_to_site : (n_hops,) int
        Sites of every hop, in the order of ``HopSummary.hop_frames``.
    """

    site_positions_A: np.ndarray
    core_radius_A: float
    nearest_site_distance_A: float
    site_occupancy: np.ndarray
    pair_from_site: np.ndarray
    pair_to_site: np.ndarray
    pair_hops: np.ndarray
    hop_from_site: np.ndarray
    hop_to_site: np.ndarray

    @property
    def n_sites(self):
        """Number of sites found."""
        return int(len(self.site_positions_A))

    def to_dict(self):
        """Plain JSON-ready dict."""
        out = to_plain(self)
        out["n_sites"] = self.n_sites
        return out

    def __repr__(self):
        busy = int(np.sum(self.site_occupancy > 0.5 / max(len(self.site_occupancy), 1)))
        return (f"SiteCensus({self.n_sites} sites, nearest {self.nearest_site_distance_A:.3g} Å, "
                f"core {self.core_radius_A:.3g} Å, {busy} occupied, "
                f"{len(self.pair_hops)} site pairs with hops)")


@dataclass(frozen=True, eq=False, repr=False)
class HopSummary:
    """Hops of one mobile species in one run.

    Attributes
    ----------
    species : str
    method : str
        ``"displacement"`` or ``"sites"``.
    reference : str
        Drift reference subtracted before detection ("framework", "all", "none").
    n_ions : int
    ion_indices : (n_ions,) int
        Atom indices of the ions, in the order of ``hops_per_ion``.
    n_frames : int
    frame_interval_ps, duration_ps : float, ps
    total_hops : int
    hops_per_ion : (n_ions,) int
    fraction_ions_hopped : float
        Fraction of ions with at least one hop.
    hop_rate_per_ion_per_ps : float, 1/ps
        total_hops / (n_ions × duration_ps).
    mean_jump_distance_A : float, Å
        Mean distance between the resting places (sites) before and after a
        hop; NaN without hops.
    total_squared_displacement_A2 : float, Å²
        Σ_i |R_i(end) − R_i(start)|² over resting places (sites).
    n_effective_hops : float
        N_eff = total_squared_displacement_A2 / mean_jump_distance_A² (0 without hops).
    hop_times_ps : (n_hops,) float, ps
        Time of each hop (trajectory clock), sorted.
    hop_frames : (n_hops,) int
        Frame index of each hop (first frame settled at the new place).
    hop_ions : (n_hops,) int
        Atom index of the ion of each hop.
    hop_jump_distances_A : (n_hops,) float, Å
    threshold_A : float, Å
        Distance a settled move must exceed to count as a hop.
    threshold_basis : str
        Where the threshold came from, in words.
    resting_place_distance_A : float, Å
        Typical shortest distance between distinct resting places seen (NaN if
        none were seen); the default threshold is ``threshold_fraction`` × it.
    smoothing_frames : int
        Width of the running median (1 = none).
    settle_frames : int
        Consecutive settled frames needed at a new place.
    time_resolution_ps : float, ps
        Stays shorter than this are merged into one hop (one frame with the
        automatic one-frame rules; stays between saved frames are never seen).
    vibration_rms_A : float, Å
        Thermal vibration about the resting places, rms per axis (measured).
    max_frame_step_A : float, Å
        Largest displacement of one ion between consecutive frames.
    sites : SiteCensus or None
        Site analysis (``method="sites"`` only).
    message : str
        Plain-words summary and any caveat.
    excursion_radius_A : float, Å
        Displacement method, automatic settings with smoothing: a raw frame
        farther than this from the resting places around it is a candidate
        short stay (kept, even one frame long, when it also lies more than
        ``threshold_A`` from the places before and after). NaN where not used.
    false_hop_allowance : float
        Hops that vibration alone is expected to add over the whole run under
        the automatic one-frame rules: 0.02, or 1 % of the hops seen while
        scouting where that is more (the sites' core radius and
        ``excursion_radius_A`` are derived from it).
    vibration_span_frames : int, frames
        How long the vibration stays correlated: the lag from which differences
        of positions that many frames apart no longer grow (the shortest lag
        tried, ≈ 0.05 ps and at least 1 frame, for vibration that is
        uncorrelated from frame to frame). The scouting blocks are at least
        this long.
    vibration_step_correlation : float
        ρ1, the correlation of the vibration between consecutive frames
        (0 when the span shows none). Where positive, the false-hop budgets of
        the one-frame rules count excursions rather than frames.
    """

    species: str
    method: str
    reference: str
    n_ions: int
    ion_indices: np.ndarray
    n_frames: int
    frame_interval_ps: float
    duration_ps: float
    total_hops: int
    hops_per_ion: np.ndarray
    fraction_ions_hopped: float
    hop_rate_per_ion_per_ps: float
    mean_jump_distance_A: float
    total_squared_displacement_A2: float
    n_effective_hops: float
    hop_times_ps: np.ndarray
    hop_frames: np.ndarray
    hop_ions: np.ndarray
    hop_jump_distances_A: np.ndarray
    threshold_A: float
    threshold_basis: str
    resting_place_distance_A: float
    smoothing_frames: int
    settle_frames: int
    time_resolution_ps: float
    vibration_rms_A: float
    max_frame_step_A: float
    sites: SiteCensus | None = None
    message: str = ""
    excursion_radius_A: float = float("nan")
    false_hop_allowance: float = float("nan")
    vibration_span_frames: int = 1
    vibration_step_correlation: float = 0.0

    def to_dict(self):
        """Plain JSON-ready dict (arrays become lists, NaN becomes None)."""
        return to_plain(self)

    def __repr__(self):
        a = ("n/a" if not math.isfinite(self.mean_jump_distance_A)
             else f"{self.mean_jump_distance_A:.3g} Å")
        return (f"HopSummary({self.species}, method={self.method!r}: {self.total_hops} hops by "
                f"{self.fraction_ions_hopped:.0%} of {self.n_ions} ions in "
                f"{self.duration_ps:g} ps, "
                f"rate {self.hop_rate_per_ion_per_ps:.4g}/ion/ps, a={a}, "
                f"N_eff={self.n_effective_hops:.4g}, threshold {self.threshold_A:.3g} Å, "
                f"resolution {self.time_resolution_ps:.3g} ps)")


# =========================================================================== small tools
def _check_positive(name, value, *, allow_none=True, integer=False):
    if value is None and allow_none:
        return None
    if integer:
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
            raise UsageError(f"{name} must be a whole number ≥ 1, got {value!r}")
        return int(value)
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise UsageError(f"{name} must be a positive number, got {value!r}") from None
    if not (math.isfinite(v) and v > 0):
        raise UsageError(f"{name} must be a positive number, got {value!r}")
    return v


def running_median(x, width):
    """Running median along axis 0 (time), edges padded by repetition.

    Parameters
    ----------
    x : (n_frames, ...) float
    width : int
        Odd window length in frames (1 returns ``x`` itself).

    Returns
    -------
    (n_frames, ...) float
    """
    n = x.shape[0]
    if width <= 1 or n < 2:
        return x
    h = width // 2
    pad = np.concatenate([np.repeat(x[:1], h, axis=0), x, np.repeat(x[-1:], h, axis=0)])
    if width == 3:
        a, b, c = pad[:n], pad[1:n + 1], pad[2:n + 2]
        lo, hi = np.minimum(a, b), np.maximum(a, b)
        return np.maximum(lo, np.minimum(hi, c))
    if width == 5:
        a, b, c, d, e = (pad[i:i + n] for i in range(5))
        lo = np.maximum(np.minimum(a, b), np.minimum(c, d))
        hi = np.minimum(np.maximum(a, b), np.maximum(c, d))
        lo, hi = np.minimum(lo, hi), np.maximum(lo, hi)
        return np.maximum(lo, np.minimum(hi, e))
    moved = np.moveaxis(x, 0, -1)
    out = _ndi.median_filter(np.ascontiguousarray(moved),
                             size=(1,) * (x.ndim - 1) + (width,), mode="nearest")
    return np.moveaxis(out, -1, 0)


def _chi3_tail(z):
    """P(|g| > z) for a 3-vector g of independent unit Gaussians (chi, 3 dof)."""
    return float(_stats.chi.sf(z, 3)) if z > 0 else 1.0


def _expected_false_hops(n_obs, reach, noise_sd, settle):
    """Expected hops that vibration alone would cause in ``n_obs`` ion-frames.

    Model (calibrated on pure Gaussian noise through the tracker, see
    docs/methods_hops_and_verdict.md): with ``settle == 1`` each crossing of
    ``reach`` makes an out-and-back pair, 2 × chi3-tail; with ``settle >= 2``
    the measured rate was 0.2–0.8 × the chi3 tail of the smoothed path, taken as 1 ×.
    """
    if noise_sd <= 0:
        return 0.0
    p = _chi3_tail(reach / noise_sd)
    return n_obs * p * (2.0 if settle == 1 else 1.0)


def _block_medians(x, b):
    """Median over consecutive blocks of ``b`` frames: (n // b, ...)."""
    if b <= 1:
        return x
    n = (x.shape[0] // b) * b
    if n == 0:
        return x[:1].copy()
    blocks = x[:n].reshape(n // b, b, *x.shape[1:])
    if b == 4:     # mean of the middle two, by min/max
        p, q, r, u = blocks[:, 0], blocks[:, 1], blocks[:, 2], blocks[:, 3]
        lo = np.maximum(np.minimum(p, q), np.minimum(r, u))
        hi = np.minimum(np.maximum(p, q), np.maximum(r, u))
        return 0.5 * (lo + hi)
    return np.median(blocks, axis=1)


def _typical_shortest(lengths):
    """Typical length of the shortest population: median of values ≤ 1.25 × the 10th percentile."""
    lengths = np.asarray(lengths, float)
    if len(lengths) == 0:
        return float("nan")
    q10 = float(np.percentile(lengths, 10))
    return float(np.median(lengths[lengths <= 1.25 * q10]))


# =========================================================================== the tracker
def _follow_resting_places(m, thr, settle, lookahead=32, min_anchor=1):
    """Find hops by following each ion's resting place; all ions of a block at once.

    The resting place at frame t is the mean of the smoothed positions of the
    current stay over its last ``_ANCHOR_MEMORY`` frames before t (cumulative
    sums make it available at any frame); in the run's first ``min_anchor``
    frames, the mean of those frames (with vibration correlated over a span,
    the first frames share one excursion and are no resting place on their
    own; later stays start from a hop, which the tracker must not blur). A hop happens at the first frame t
    where the smoothed position and the next ``settle − 1`` ones are farther
    than ``thr`` from it and within ``thr`` of the position at t. Each step
    looks ``lookahead`` frames ahead of every ion for its next hop, so the
    Python work grows with the hops per ion, not with frames × ions.

    Parameters
    ----------
    m : (n_frames, k, 3) float, Å
        Smoothed positions.
    thr : float, Å
    settle : int
    lookahead : int
    min_anchor : int
        Frames a resting place averages over at least (1: none).

    Returns
    -------
    frames, ions : (n_hops,) int
        Hop frame and local ion index, sorted by ion then time.
    """
    n, k, _ = m.shape
    thr2 = thr * thr
    mk = np.ascontiguousarray(m.transpose(1, 0, 2)).reshape(-1, 3)      # ion-major rows
    Sk = np.zeros((k, n + 1, 3))
    np.cumsum(m.transpose(1, 0, 2), axis=1, out=Sk[:, 1:])
    Sk = Sk.reshape(-1, 3)
    start = np.zeros(k, dtype=np.int64)
    cur = np.ones(k, dtype=np.int64)
    limit = n - settle + 1
    frames, ions = [], []
    steps = np.arange(max(1, int(lookahead)))
    L = len(steps)
    mem = _ANCHOR_MEMORY
    active = np.flatnonzero(cur < limit)
    while len(active):
        T = cur[active, None] + steps[None, :]                       # (ka, L)
        inside = T < limit
        np.minimum(T, max(limit - 1, 1), out=T)
        base_m = (active * n)[:, None]
        base_s = (active * (n + 1))[:, None]
        if min_anchor > 1:   # the first stay's place: the mean of at least min_anchor frames
            up = np.where(start[active, None] == 0, np.maximum(T, min(min_anchor, n)), T)
        else:
            up = T
        lo = np.maximum(start[active, None], up - mem)
        A = (Sk[base_s + up] - Sk[base_s + lo]) / (up - lo)[..., None]
        mt = mk[base_m + T]
        d = mt - A
        far = np.einsum("ali,ali->al", d, d) > thr2
        far &= inside
        for j in range(1, settle):
            mn = mk[base_m + np.minimum(T + j, n - 1)]
            dn = mn - A
            dc = mn - mt
            far &= np.einsum("ali,ali->al", dn, dn) > thr2
            far &= np.einsum("ali,ali->al", dc, dc) <= thr2
        has = far.any(axis=1)
        if has.any():
            hi = active[has]
            th = T[has, np.argmax(far[has], axis=1)]
            frames.append(th)
            ions.append(hi)
            start[hi] = th
            cur[hi] = th + 1
            cur[active[~has]] += L
        else:
            cur[active] += L
        active = active[cur[active] < limit]
    if not frames:
        return np.zeros(0, dtype=np.int64), np.zeros(0, dtype=np.int64)
    frames = np.concatenate(frames)
    ions = np.concatenate(ions)
    order = np.lexsort((frames, ions))
    return frames[order], ions[order]


def _stay_centres(m, frames, ions, thr):
    """Centre of every stay: mean of its smoothed positions within ``thr`` of the stay mean.

    Parameters
    ----------
    m : (n_frames, k, 3) float, Å
    frames, ions : (n_hops,) int
        Hops sorted by ion, then time.
    thr : float, Å

    Returns
    -------
    centres : (n_hops + k, 3) float, Å
        Stays ordered by ion then time: ion i's stays are rows
        ``first[i] .. first[i] + hops_i``.
    first : (k,) int
        Row of each ion's first stay.
    lengths : (n_hops + k,) int
        Frames per stay.
    sid : (n_frames, k) int
        Stay row of every frame.
    """
    n, k, _ = m.shape
    counts = np.bincount(ions, minlength=k)
    first = np.concatenate([[0], np.cumsum(counts + 1)[:-1]])
    mark = np.zeros((n, k), dtype=np.int64)
    np.add.at(mark, (frames, ions), 1)
    sid = np.cumsum(mark, axis=0) + first[None, :]
    g = sid.ravel()
    n_st = int(first[-1] + counts[-1] + 1)
    lengths = np.bincount(g, minlength=n_st)
    flat = m.reshape(-1, 3)
    g3 = (g[:, None] * 3 + np.arange(3)[None, :]).ravel()

    def sums(weights):
        return np.bincount(g3, weights=weights.ravel(), minlength=3 * n_st).reshape(n_st, 3)

    centre = sums(flat) / np.maximum(lengths, 1)[:, None]
    for _ in range(2):
        d = flat - centre[g]
        keep = np.einsum("ij,ij->i", d, d) <= thr * thr
        kept = np.bincount(g, weights=keep, minlength=n_st)
        new = sums(flat * keep[:, None])
        ok = kept > 0
        centre[ok] = new[ok] / kept[ok, None]
    return centre, first, lengths, sid


def _hop_rows(first, ions):
    """Row of the stay each hop leaves (hops sorted by ion, then time)."""
    rank = np.arange(len(ions)) - np.searchsorted(ions, ions)
    return first[ions] + rank


# =========================================================================== one-frame stays
def _entry_share(rho1, u):
    """Separate excursions beyond u σ per frame spent beyond it, for correlated vibration.

    A stationary Gaussian process whose consecutive frames have correlation
    ρ1 crosses zero upwards arccos(ρ1) / (2π) times per frame (the sign-change
    probability of a bivariate normal pair is arccos(ρ1)/π; Sheppard's
    formula), and a high level u σ about exp(−u²/2) times as often (Rice's
    formula for the rate of upcrossings; Rice, Bell Syst. Tech. J. 24, 46
    (1945), from memory). Frames spent beyond u σ number P(g > u) ≈
    φ(u)/u per frame, so each excursion lasts 1/s frames with
    s = u · arccos(ρ1) / √(2π), capped at 1 (one excursion per frame at most:
    uncorrelated vibration, or any level at which an excursion lasts one frame).

    Parameters
    ----------
    rho1 : float
        Correlation of the vibration between consecutive frames.
    u : float or ndarray
        Level, in vibration rms.

    Returns
    -------
    float or ndarray, in (0, 1]
    """
    rate = math.acos(min(max(rho1, -1.0), 1.0)) / math.sqrt(2.0 * math.pi)
    share = np.asarray(u, float) * rate
    out = np.clip(share, 1e-12, 1.0)
    return float(out) if out.ndim == 0 else out


def _excursion_radius(n_obs, noise_sd, allowance, rho1=0.0):
    """Distance from every resting place beyond which one raw frame is taken as elsewhere.

    Vibration alone puts a frame farther than R from its resting place with
    probability P(|g| > R / σ) (g a 3-vector of unit Gaussians); each such frame
    taken as a stay makes two hops (out and back), so R solves
    2 · n_obs · P(|g| > R / σ) = ``allowance``. With vibration correlated from
    frame to frame (ρ1 > 0) the frames beyond R come in excursions of several
    frames, and only the excursions count: the left side is multiplied by
    :func:`_entry_share` (1 for uncorrelated vibration).

    Parameters
    ----------
    n_obs : int
        Ion-frames examined.
    noise_sd : float, Å
        Per-axis vibration rms of the raw positions.
    allowance : float
        Expected false hops accepted over the run.
    rho1 : float
        Correlation of the vibration between consecutive frames (0: none).

    Returns
    -------
    float, Å
    """
    if not noise_sd > 0:
        return 0.0
    p = min(0.5, allowance / (2.0 * max(n_obs, 1)))
    u = float(_stats.chi.isf(p, 3))
    if rho1 > 0 and _entry_share(rho1, u) < 1.0:
        # correlated vibration: fewer separate excursions than frames beyond R;
        # 2 n_obs s(u) P(|g| > u) decreases with u above √2, so bisect
        def excess(v):
            return 2.0 * n_obs * _entry_share(rho1, v) * _chi3_tail(v) - allowance
        lo, hi = math.sqrt(2.0), u
        if excess(lo) > 0:
            for _ in range(50):
                mid = 0.5 * (lo + hi)
                lo, hi = (mid, hi) if excess(mid) > 0 else (lo, mid)
            u = hi
    return u * float(noise_sd)


def _refine_stays(pos, frames, ions, centres, first, lengths, sid, thr, reach, delta, span=1):
    """Re-time the tracker's hops on the raw positions and recover the stays it merged.

    Three steps, all ions of a block at once:

    1. **Stays that stand out.** A stay of L frames is kept when the mean of
       its raw positions lies farther than ``reach``/√(L/span) (``reach`` at
       most) from the places before and after it (the one-frame rule below,
       applied to a mean of L/span independent samples); otherwise it
       joins the neighbour it is close to. Consecutive stays whose centres are within
       ``thr`` of each other are then one place (the tracker can leave a place
       for a stay too short to hold its resting place and come back).
    2. **Re-timing.** Each remaining hop is moved, within ``delta`` frames (and
       never past half-way to the ion's neighbouring hops), to the split that
       best fits the raw positions: frames before it nearer the old place,
       frames from it on nearer the new one (least squares, the most likely
       change point for Gaussian vibration). Frames farther than ``reach`` from
       both places do not vote.
    3. **Short stays.** A raw frame farther than ``reach`` from the place it
       is assigned to is *elsewhere*. Consecutive elsewhere frames less than
       ``thr`` apart form a candidate stay; it is kept, whatever its length (one
       frame included), when its mean lies more than ``thr`` from the places the
       ion held just before and just after it (so a frame caught half-way along
       a jump is not a place).

    Parameters
    ----------
    pos : (n_frames, k, 3) float, Å
        Raw positions.
    frames, ions : (n_hops,) int
        Tracker hops, sorted by ion then time.
    centres : (n_stays, 3) float, Å
        Stay centres (:func:`_stay_centres`).
    first : (k,) int
        Row of each ion's first stay.
    lengths : (n_stays,) int
        Frames per stay.
    sid : (n_frames, k) int
        Stay row of every frame.
    thr : float, Å
        Hop threshold θ.
    reach : float, Å
        Elsewhere radius R (:func:`_excursion_radius`).
    delta : int
        Largest shift of a hop, frames.
    span : int
        Frames over which vibration stays correlated (1: uncorrelated).

    Returns
    -------
    label : (k, n_frames) int
        Place of every frame: a row of ``places``.
    places : (n_places, 3) float, Å
        Centres of the tracker's places followed by the recovered short stays.
    """
    n, k, _ = pos.shape
    x = np.ascontiguousarray(pos.transpose(1, 0, 2))                 # (k, n, 3)
    reach2, thr2 = reach * reach, thr * thr

    # ---- 1. keep the tracker's stays that stand out from vibration; join the rest
    if len(frames):
        rows = _hop_rows(first, ions)
        n_st = len(centres)
        S = sid.T.ravel()
        xf = x.reshape(-1, 3)
        cnt = np.maximum(np.bincount(S, minlength=n_st), 1)
        raw = np.stack([np.bincount(S, weights=xf[:, a], minlength=n_st) for a in range(3)],
                       axis=1) / cnt[:, None]
        # a stay of L frames stands out when its raw mean lies farther than R/√L
        # (the excursion radius of one frame, scaled to a mean) from both neighbours
        # frames within one vibration span are not independent: L/span of them count
        lim2 = reach2 / np.maximum(cnt / float(span), 1.0)
        has_before = np.ones(n_st, dtype=bool)
        has_before[first] = False
        has_after = np.ones(n_st, dtype=bool)
        has_after[first + np.bincount(ions, minlength=k)] = False
        close = []
        for has, shift in ((has_before, -1), (has_after, 1)):
            r = np.flatnonzero(has)
            d = raw[r] - centres[r + shift]
            c = np.zeros(n_st, dtype=bool)
            c[r[np.einsum("si,si->s", d, d) <= lim2[r]]] = True
            close.append(c)
        # a stay that does not stand out joins the neighbour it is close to
        drop = close[0][rows + 1] | (close[1][rows] & ~close[0][rows])
        frames, ions, rows = frames[~drop], ions[~drop], rows[~drop]
        wts = cnt.astype(float)
        while True:          # then join consecutive stays closer than θ (one place)
            start_g = np.zeros(n_st, dtype=np.int64)
            start_g[first] = 1
            start_g[rows + 1] = 1
            group = np.cumsum(start_g) - 1
            n_g = int(group[-1]) + 1
            wsum = np.bincount(group, weights=wts, minlength=n_g)
            places = np.stack([np.bincount(group, weights=wts * centres[:, a], minlength=n_g)
                               for a in range(3)], axis=1) / wsum[:, None]
            d = places[group[rows + 1]] - places[group[rows]]
            moved = np.einsum("hi,hi->h", d, d) > thr2
            if moved.all():
                break
            frames, ions, rows = frames[moved], ions[moved], rows[moved]
        first = group[first]
    else:
        places = centres

    # ---- 2. re-time: the least-squares change point between the two places
    h = len(frames)
    if h:
        rows = _hop_rows(first, ions)
        same_prev = np.r_[False, ions[1:] == ions[:-1]]
        same_next = np.r_[ions[:-1] == ions[1:], False]
        prev_f = np.r_[0, frames[:-1]]
        next_f = np.r_[frames[1:], 0]
        lo = np.where(same_prev, (prev_f + frames) // 2 + 1, 1)
        hi = np.where(same_next, (frames + next_f) // 2, n - 1)
        lo = np.maximum(lo, frames - delta)
        hi = np.minimum(hi, frames + delta)
        T = frames[:, None] + np.arange(-delta, delta + 1)[None, :]  # (h, 2δ+1)
        ok = (T >= lo[:, None]) & (T <= hi[:, None])
        Tc = np.clip(T, 0, n - 1)
        xt = x[ions[:, None], Tc]                                     # (h, 2δ+1, 3)
        d_new = xt - places[rows + 1][:, None, :]
        d_old = xt - places[rows][:, None, :]
        r_new = np.einsum("hji,hji->hj", d_new, d_new)
        r_old = np.einsum("hji,hji->hj", d_old, d_old)
        e = r_new - r_old
        e[~ok | ((r_new > reach2) & (r_old > reach2))] = 0.0
        cost = np.cumsum(e[:, ::-1], axis=1)[:, ::-1]                 # Σ_{t ≥ τ} e_t
        cost[~ok] = np.inf
        frames = T[np.arange(h), np.argmin(cost, axis=1)]
    mark = np.zeros((k, n), dtype=np.int64)
    np.add.at(mark, (ions, frames), 1)
    label = np.cumsum(mark, axis=1)
    label += first[:, None]
    del mark

    # ---- 3. short stays among the frames away from their place
    d = x - places[label]
    away = np.einsum("kti,kti->kt", d, d) > reach2
    del d
    if away.any():
        step = x[:, 1:] - x[:, :-1]
        cont = away[:, 1:] & away[:, :-1] & (np.einsum("kti,kti->kt", step, step) <= thr2)
        del step
        start = away.copy()
        start[:, 1:] &= ~cont
        end = away.copy()
        end[:, :-1] &= ~cont
        seg = np.cumsum(start.ravel()) - 1                            # segment of each frame
        fa = np.flatnonzero(away.ravel())
        g = seg[fa]
        n_seg = int(start.sum())
        cnt = np.bincount(g, minlength=n_seg)
        xf = x.reshape(-1, 3)
        cen = np.stack([np.bincount(g, weights=xf[fa, a], minlength=n_seg) for a in range(3)],
                       axis=1) / cnt[:, None]
        s_flat = np.flatnonzero(start.ravel())
        e_flat = np.flatnonzero(end.ravel())
        lf = label.reshape(-1)
        has_before = (s_flat % n) > 0
        has_after = (e_flat % n) < n - 1
        keep = has_before | has_after
        for has, at in ((has_before, s_flat - 1), (has_after, e_flat + 1)):
            dd = cen - places[lf[np.clip(at, 0, len(lf) - 1)]]
            keep &= (np.einsum("si,si->s", dd, dd) > thr2) | ~has
        if keep.any():
            new_row = np.full(n_seg, -1, dtype=np.int64)
            new_row[keep] = len(places) + np.arange(int(keep.sum()))
            places = np.concatenate([places, cen[keep]])
            take = new_row[g] >= 0
            lf[fa[take]] = new_row[g[take]]
            label = lf.reshape(k, n)
    return label, places


# =========================================================================== scouting
@dataclass
class _Scout:
    """What the coarse pass learns: vibration, jump lengths, resting places."""

    jumps: list = field(default_factory=list)
    starts: list = field(default_factory=list)
    lag_sigma: list = field(default_factory=list)
    hops: int = 0
    max_step: float = 0.0
    sample: tuple | None = None


def _lag_sigma(x, lag, max_values=300_000):
    """Robust per-axis vibration rms from differences ``lag`` frames apart: (value, count).

    The median absolute difference of at most ``max_values`` differences
    (evenly strided) over sqrt(2), scaled to a Gaussian sd by 1.4826.
    """
    if x.shape[0] <= lag:
        return 0.0, 0
    d = np.abs(x[lag:] - x[:-lag]).ravel()
    step = max(1, d.size // max_values)
    d = d[::step]
    return float(1.4826 * np.median(d) / math.sqrt(2.0)), int(d.size)


def _vibration_span(x, lag0, max_lag):
    """How long vibration stays correlated, and its rms, from robust lag differences.

    For stationary vibration the per-axis variance of differences ``L`` frames
    apart is v(L) = 2σ²(1 − ρ(L)) (ρ the autocorrelation): it rises with L
    while the motion is correlated and levels off at 2σ² once it is not. The
    lags tried are ``lag0`` · 1, 2, 4, ... ≤ ``max_lag``; the *span* is the first
    lag after which v rises by less than ``_SPAN_RISE`` (so hops, which make v
    grow slowly at long lags, do not stretch it; where v still rises at the
    longest lag no plateau was seen and the span is ``lag0``), and σ is the largest
    √(v/2) up to the span (an oscillator overshoots 2σ² near half a period,
    so σ may come out up to ≈ 1.3 × too large: safe for a provisional
    threshold). Uncorrelated vibration gives span = ``lag0`` and the
    σ of :func:`_lag_sigma` at ``lag0``.

    Parameters
    ----------
    x : (n_frames, k, 3) float, Å
    lag0 : int
        Shortest lag, frames.
    max_lag : int
        Longest lag tried, frames.

    Returns
    -------
    span : int, frames
    sigma : float, Å
    profile : list of (lag, sigma_lag)
    """
    lags = [int(lag0)]
    while 2 * lags[-1] <= max_lag:
        lags.append(2 * lags[-1])
    # time-strided pairs (≤ 300,000 values per lag), computed only up to the plateau
    stride = max(1, int(x.shape[0] * x.shape[1] * 3 // 300_000))
    sig = []
    k = 0
    plateau = False
    for j, L in enumerate(lags):
        if x.shape[0] <= L:
            break
        d = np.abs(x[L::stride] - x[:-L:stride]).ravel()
        sig.append(float(1.4826 * np.median(d) / math.sqrt(2.0)))
        if j and sig[j] ** 2 <= _SPAN_RISE * sig[j - 1] ** 2:
            plateau = True
            break
        k = j
    if not sig:
        return int(lag0), 0.0, []
    if not plateau:          # still rising at the longest lag: no plateau seen
        k = 0
    return lags[k], float(max(sig[:k + 1])), list(zip(lags, sig))


def _steps_per_span(x, sig_step, span):
    """Expected steps too large for vibration that one ion makes within ``span`` frames.

    A step between consecutive frames is too large when its length exceeds
    ``_BIG_STEP_Z`` × √2 × ``sig_step`` (the per-axis rms of the step is √2 σ_1
    for vibration alone; Gaussian steps go that far with probability < 1e-12).

    Parameters
    ----------
    x : (n_frames, k, 3) float, Å
    sig_step : float, Å
        Robust per-axis σ from differences one frame apart (:func:`_lag_sigma`).
    span : int, frames

    Returns
    -------
    float
    """
    if x.shape[0] < 2:
        return 0.0
    d = np.diff(x, axis=0)
    lim = _BIG_STEP_Z * math.sqrt(2.0) * max(sig_step, 1e-6)
    big = np.einsum("tki,tki->tk", d, d) > lim * lim
    return float(np.mean(big)) * span


def _scout_block(pos, b, lag, scout):
    """Coarse pass over one block: block medians followed with a vibration-based threshold."""
    step = np.diff(pos, axis=0)
    if step.size:
        scout.max_step = max(scout.max_step,
                             float(np.sqrt(np.einsum("tki,tki->tk", step, step).max())))
    del step
    if isinstance(lag, tuple):       # correlated vibration: the plateau rms up to the span
        lags = [lag[0]]
        while 2 * lags[-1] <= lag[1]:
            lags.append(2 * lags[-1])
        sig = max(_lag_sigma(pos, L)[0] for L in lags)
        cnt = pos.size
    else:
        sig, cnt = _lag_sigma(pos, lag)
    scout.lag_sigma.append((sig, cnt))
    thr0 = max(_SCOUT_Z * sig, 1e-3)
    xd = _block_medians(pos, b)
    frames, ions = _follow_resting_places(xd, thr0, 2, lookahead=16)
    centres, first, lengths, sid = _stay_centres(xd, frames, ions, thr0)
    scout.hops += len(frames)
    scout.starts.append(centres[first])
    if len(frames):
        rows = _hop_rows(first, ions)
        long_ = (lengths[rows] >= 3) & (lengths[rows + 1] >= 3)
        vec = centres[rows + 1] - centres[rows]
        length = np.sqrt(np.einsum("ij,ij->i", vec, vec))
        scout.jumps.append(length[long_ & (length > thr0)])
    if scout.sample is None:
        ks = min(_NOISE_SAMPLE_IONS, pos.shape[1])
        nd = min(len(xd), max(1, _NOISE_SAMPLE_FRAMES // b))
        keep = (ions < ks) & (frames < nd)
        scout.sample = (pos[:nd * b, :ks].copy(), b, frames[keep], ions[keep],
                        centres, sid[:nd, :ks])


class _NoiseLadder:
    """Measured per-axis noise of the running median of each width, inside long stays."""

    def __init__(self, sample, fallback_sigma):
        self.fallback = fallback_sigma
        self.cache = {}
        self.ok = False
        if sample is None:
            return
        x, b, frames, ions, centres, sid = sample
        nd, ks = sid.shape
        if nd < 8:
            return
        # distance (in blocks) from each block to the nearest scouted hop of the same ion
        dist = np.full((nd, ks), nd, dtype=np.int64)
        pos = np.arange(nd)
        for i in range(ks):
            hf = np.sort(frames[ions == i])
            if len(hf):
                j = np.searchsorted(hf, pos)
                left = pos - hf[np.maximum(j - 1, 0)]
                left = np.where(j > 0, left, nd)
                right = hf[np.minimum(j, len(hf) - 1)] - pos
                right = np.where(j < len(hf), right, nd)
                dist[:, i] = np.minimum(np.abs(left), np.abs(right))
        self.x, self.b, self.dist = x, b, dist
        self.ref = np.repeat(centres[sid], b, axis=0)            # (nd*b, ks, 3)
        self.ok = True

    def __call__(self, w):
        if w in self.cache:
            return self.cache[w]
        value = None
        if self.ok:
            margin = 2 + (w // 2 + self.b - 1) // self.b
            good_blocks = self.dist >= margin
            good_blocks[:margin] = False
            good_blocks[-margin:] = False
            if good_blocks.sum() >= 20:
                good = np.repeat(good_blocks, self.b, axis=0)
                r = np.abs(running_median(self.x, w) - self.ref)[good]
                value = float(1.4826 * np.median(r))
        if value is None:
            value = self.fallback * (1.0 if w == 1 else 1.2533 / math.sqrt(w))
        self.cache[w] = value
        return value


def _nearest_distinct(points, cell, min_dist):
    """Distance from each point to its nearest other point farther than ``min_dist`` (min image)."""
    p = np.asarray(points, float)
    if len(p) > 2000:
        p = p[np.linspace(0, len(p) - 1, 2000).astype(int)]
    n = len(p)
    if n < 2:
        return np.zeros(0)
    inv = np.linalg.inv(cell)
    frac = p @ inv
    out = np.full(n, np.inf)
    for s in range(0, n, 256):
        d = frac[None, :, :] - frac[s:s + 256, None, :]
        d -= np.round(d)
        r = np.linalg.norm(d @ cell, axis=-1)
        r[r <= min_dist] = np.inf
        out[s:s + 256] = r.min(axis=1)
    return out[np.isfinite(out)]


# =========================================================================== sites
def _find_sites(points_frac, cell, sigma, merge_A):
    """Peaks of the periodic density of wrapped fractional points.

    Returns
    -------
    frac : (n_sites, 3) float
        Fractional site centres in [0, 1).
    weight : (n_sites,) float
        Share of the points in the box around each site (sums to ≤ 1).
    """
    heights = cell_heights(cell)
    h = float(np.clip(sigma / 2.0, 0.05, 0.25))
    nb = np.maximum(8, np.ceil(heights / h)).astype(int)
    while np.prod(nb.astype(float)) > _DENSITY_MAX_BINS:
        nb = np.maximum(8, (nb * 0.8).astype(int))
    f = points_frac - np.floor(points_frac)
    ijk = np.minimum((f * nb).astype(np.int64), nb - 1)
    flat = np.ravel_multi_index((ijk[:, 0], ijk[:, 1], ijk[:, 2]), tuple(nb))
    counts = np.bincount(flat, minlength=int(np.prod(nb))).reshape(tuple(nb)).astype(float)
    bin_A = heights / nb
    dens = _ndi.gaussian_filter(counts, np.maximum(0.5, 0.5 * max(sigma, 0.05) / bin_A),
                                mode="wrap")
    half = np.maximum(1, np.round(0.5 * merge_A / bin_A)).astype(int)
    peak = dens == _ndi.maximum_filter(dens, size=tuple(2 * half + 1), mode="wrap")
    peak &= dens > 1e-3 * dens.max()
    idx = np.argwhere(peak)
    if len(idx) == 0:
        return np.zeros((0, 3)), np.zeros(0)
    strength = dens[tuple(idx.T)]
    # centroid of the counts in a periodic box of ±2.5 σ (at most ±0.4 × the merge
    # distance) around each peak, twice (the second box centred on the first centroid)
    r = np.maximum(1, np.round(min(2.5 * max(sigma, 0.05), 0.4 * merge_A) / bin_A)).astype(int)
    offs = np.stack(np.meshgrid(*[np.arange(-r[j], r[j] + 1) for j in range(3)],
                                indexing="ij"), axis=-1).reshape(-1, 3)
    frac = (idx + 0.5) / nb
    for _ in range(2):
        at = np.floor(frac * nb).astype(np.int64)
        cells_ = at[:, None, :] + offs[None, :, :]
        around = cells_ % nb
        wts = counts[around[..., 0], around[..., 1], around[..., 2]]
        tot = wts.sum(axis=1)
        mean = (wts[..., None] * ((cells_ + 0.5) / nb)).sum(axis=1)
        mean /= np.maximum(tot, 1e-300)[:, None]
        frac = np.where((tot > 0)[:, None], mean, frac)
    weight = tot / max(len(points_frac), 1)
    # merge peaks closer than merge_A, strongest first
    order = np.argsort(-strength)
    frac = frac[order] % 1.0
    weight = weight[order]
    shifts = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)])
    imgs = (frac[None, :, :] + shifts[:, None, :]).reshape(-1, 3) @ cell
    neighbours = _spatial.cKDTree(imgs).query_ball_point(frac @ cell, r=merge_A)
    gone = np.zeros(len(frac), dtype=bool)
    keep = []
    for j in range(len(frac)):
        if gone[j]:
            continue
        keep.append(j)
        nb_ = np.asarray(neighbours[j], dtype=np.int64) % len(frac)
        gone[nb_[nb_ > j]] = True
    return frac[keep], weight[keep]


class _SiteLocator:
    """Which site's core (if any) holds a position; minimum image in the mean cell.

    Cores do not overlap (radius ≤ 0.45 × the nearest site distance), so at
    most one site qualifies. Positions are binned on a coarse fractional grid;
    each bin lists the sites whose core reaches into it, and only those are
    measured.
    """

    def __init__(self, frac_sites, cell, core):
        self.cell = np.asarray(cell, float)
        self.inv = np.linalg.inv(self.cell)
        self.frac = np.asarray(frac_sites, float) % 1.0
        self.n = len(self.frac)
        self.cart = self.frac @ self.cell
        self.core = float(core)
        heights = cell_heights(self.cell)
        self.nb = np.maximum(1, np.floor(heights / max(self.core, 0.25))).astype(int)
        grid = np.stack(np.meshgrid(*[np.arange(m) for m in self.nb], indexing="ij"),
                        axis=-1).reshape(-1, 3)
        centres = ((grid + 0.5) / self.nb) @ self.cell
        edges = self.cell / self.nb[:, None]
        corners = np.array([[i, j, k] for i in (-1, 1) for j in (-1, 1) for k in (-1, 1)])
        half_diag = 0.5 * float(np.max(np.linalg.norm(corners @ edges, axis=1)))
        shifts = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)])
        imgs = (self.frac[None, :, :] + shifts[:, None, :]).reshape(-1, 3) @ self.cell
        tree = _spatial.cKDTree(imgs)
        k = min(8, len(imgs))
        _, near = tree.query(centres, k=k, distance_upper_bound=self.core + half_diag + 1e-9)
        near = np.asarray(near).reshape(len(centres), k)
        cand = np.where(near < len(imgs), near % self.n, -1)
        used = np.flatnonzero((cand >= 0).any(axis=0))
        self.cand = cand[:, :max(1, used.max() + 1 if len(used) else 1)]

    def core_site(self, pos, inv_cells=None, chunk=200_000):
        """Site whose core holds each position, or -1.

        Parameters
        ----------
        pos : (n, k, 3) float, Å
        inv_cells : (n, 3, 3) float, optional
            Per-frame inverse cells (variable cell); else the mean cell is used.

        Returns
        -------
        (n, k) int
        """
        shape = pos.shape[:-1]
        if inv_cells is None:
            frac = pos.reshape(-1, 3) @ self.inv
        else:
            frac = np.einsum("tka,tab->tkb", pos, inv_cells).reshape(-1, 3)
        frac -= np.floor(frac)
        out = np.full(len(frac), -1, dtype=np.int64)
        core2 = self.core * self.core
        for s in range(0, len(frac), chunk):
            f = frac[s:s + chunk]
            ijk = np.minimum((f * self.nb).astype(np.int64), self.nb - 1)
            b = np.ravel_multi_index((ijk[:, 0], ijk[:, 1], ijk[:, 2]), tuple(self.nb))
            c = self.cand[b]                                         # (m, width)
            d = self.frac[np.maximum(c, 0)] - f[:, None, :]
            d -= np.round(d)
            d = d @ self.cell
            r2 = np.einsum("mci,mci->mc", d, d)
            r2[c < 0] = np.inf
            j = np.argmin(r2, axis=1)
            rows = np.arange(len(f))
            hit = r2[rows, j] <= core2
            out[s:s + chunk] = np.where(hit, c[rows, j], -1)
        return out.reshape(shape)

    def min_image(self, vec):
        """Minimum-image version of Cartesian vectors (..., 3) in the mean cell."""
        f = vec @ self.inv
        f -= np.round(f)
        return f @ self.cell


def _site_changes(label, decisive, settle):
    """Clean one ion's site labels into hops.

    Parameters
    ----------
    label : (n,) int
        Nearest site per frame.
    decisive : (n,) bool
        True where the position is inside that site's core.
    settle : int
        Visits with fewer decisive frames are dropped (the ion is taken to have
        stayed where it was).

    Returns
    -------
    frames, from_site, to_site : (n_hops,) int
        First decisive frame at the new site, and the sites.
    first_site : int
        Site at the start (-1 if the ion never entered a core).
    """
    fr = np.flatnonzero(decisive)
    if len(fr) == 0:
        return np.zeros(0, int), np.zeros(0, int), np.zeros(0, int), -1
    lab = label[fr]
    if settle > 1:
        brk = np.flatnonzero(lab[1:] != lab[:-1]) + 1
        starts = np.concatenate([[0], brk])
        lengths = np.diff(np.concatenate([starts, [len(lab)]]))
        valid_run = lengths >= settle
        if not valid_run.any():
            valid_run[np.argmax(lengths)] = True
        valid = np.repeat(valid_run, lengths)
        src = np.where(valid, np.arange(len(lab)), -1)
        src = np.maximum.accumulate(src)
        src[src < 0] = int(np.argmax(valid))
        lab = lab[src]
    brk = np.flatnonzero(lab[1:] != lab[:-1]) + 1
    return fr[brk], lab[brk - 1], lab[brk], int(lab[0])


def _build_sites(stream, cells, sigma, thr, fallback_sep):
    """Sites from the density of the mobile species.

    Returns
    -------
    locator : _SiteLocator
        With the largest core radius, r_max = min(d_nn − θ, 0.45 d_nn).
    d_nn : float, Å
        Typical nearest-site distance.
    r_max : float, Å
    neighbour_A : (n_sites, m) float, Å
        Distances from each site to its m ≤ 12 nearest other sites (periodic images).
    weight : (n_sites,) float
        Share of the density at each site.
    """
    mean_cell = cells.mean(axis=0)
    const_cell = bool(np.allclose(cells, cells[:1]))
    inv_cells = None if const_cell else np.linalg.inv(cells)
    inv_mean = np.linalg.inv(mean_cell)
    stride = max(1, int(math.ceil(stream.n_frames * stream.n_atoms / _DENSITY_POINTS)))
    pts = []
    for _, pos in stream():
        p = pos[::stride]
        if inv_cells is None:
            pts.append(p.reshape(-1, 3) @ inv_mean)
        else:
            pts.append(np.einsum("tka,tab->tkb", p, inv_cells[::stride]).reshape(-1, 3))
    frac_sites, weight = _find_sites(np.concatenate(pts), mean_cell, sigma, merge_A=thr)
    if len(frac_sites) == 0:
        raise InputError("count_hops(method='sites'): no sites found in the density of the "
                         "species; use method='displacement'")
    cart = frac_sites @ mean_cell
    shifts = np.array([(i, j, k) for i in (-1, 0, 1) for j in (-1, 0, 1) for k in (-1, 0, 1)])
    imgs = (frac_sites[None, :, :] + shifts[:, None, :]).reshape(-1, 3) @ mean_cell
    d, _ = _spatial.cKDTree(imgs).query(cart, k=min(13, len(imgs)))
    neighbour = np.asarray(d, float).reshape(len(cart), -1)[:, 1:]
    if len(frac_sites) > 1:
        # from the busier half of the sites: centres of rarely visited ones are rough
        busy = weight >= np.median(weight)
        d_nn = float(_typical_shortest(neighbour[busy, 0]))
    else:
        d_nn = float(fallback_sep)
    core = min(d_nn - thr, 0.45 * d_nn)
    if not core > 0:
        core = 0.4 * d_nn
    locator = _SiteLocator(frac_sites, mean_cell, core)
    return locator, d_nn, core, neighbour, weight


def _core_radius(neighbour_A, weight, noise_sd, n_obs, allowance, r_max, rho1=0.0):
    """Largest core radius ≤ ``r_max`` whose false entries stay within ``allowance``.

    An ion vibrating about site i (per-axis rms σ) lands inside the core
    (radius r) of a neighbour j at distance d_ij with probability
    P(|σg − d_ij| < r) = F(r²/σ²; 3, d_ij²/σ²), F the non-central χ² CDF with 3
    degrees of freedom; each such entry makes two hops (there and back). With
    w_i the share of the density at site i, the expected false hops are
    2 · n_obs · Σ_i w_i Σ_j F(...). With vibration correlated from frame to
    frame (ρ1 > 0) each F is multiplied by :func:`_entry_share` at the level
    (d_ij − r)/σ: frames inside a core come in visits of several frames, and
    only visits count.

    Parameters
    ----------
    neighbour_A : (n_sites, m) float, Å
    weight : (n_sites,) float
    noise_sd : float, Å
    n_obs : int
        Ion-frames assigned.
    allowance : float
        Expected false hops accepted over the run.
    r_max : float, Å
    rho1 : float
        Correlation of the vibration between consecutive frames (0: none).

    Returns
    -------
    radius : float, Å
    expected : float
        Expected false hops at that radius.
    """
    if not noise_sd > 0 or neighbour_A.size == 0:
        return float(r_max), 0.0
    lam = np.round(neighbour_A / noise_sd, 3)
    uniq, inv = np.unique(lam, return_inverse=True)
    inv = inv.reshape(lam.shape)
    w = np.asarray(weight, float)
    w = w / w.sum() if w.sum() > 0 else np.full(len(w), 1.0 / len(w))

    def expected(r):
        p = _stats.ncx2.cdf((r / noise_sd) ** 2, 3, uniq ** 2)
        if rho1 > 0:      # correlated vibration: count entries, not frames inside
            p = p * _entry_share(rho1, np.maximum(uniq - r / noise_sd, 0.0))
        return 2.0 * n_obs * float(w @ p[inv].sum(axis=1))

    e_max = expected(r_max)
    if e_max <= allowance:
        return float(r_max), e_max
    lo, hi = 0.0, float(r_max)
    for _ in range(40):
        mid = 0.5 * (lo + hi)
        if expected(mid) <= allowance:
            lo = mid
        else:
            hi = mid
    return lo, expected(lo)


# =========================================================================== streaming
class _Stream:
    """Blocks of the species' positions minus the drift reference; cached if one block."""

    def __init__(self, traj, idx, ref_track, memory_budget_MB):
        self.traj, self.idx, self.ref = traj, idx, ref_track
        self.block = max(1, traj.block_size_for(memory_budget_MB, copies=8))
        self.n_blocks = -(-len(idx) // self.block)
        self.n_frames, self.n_atoms = traj.n_frames, len(idx)
        self._cache = None

    def __call__(self):
        if self._cache is not None:
            yield from self._cache
            return
        keep = []
        for ids, pos in self.traj.iter_atom_blocks(self.idx, block_size=self.block):
            pos = pos - self.ref[:, None, :]
            if self.n_blocks == 1:
                keep.append((ids, pos))
            yield ids, pos
        if self.n_blocks == 1:
            self._cache = keep


# =========================================================================== main entry
def count_hops(traj, species, *, method="displacement", reference=None, threshold_A=None,
               threshold_fraction=DEFAULT_THRESHOLD_FRACTION, smoothing_frames=None,
               settle_frames=None, memory_budget_MB=256.0):
    """Count the hops of one mobile species.

    Parameters
    ----------
    traj : Trajectory
        Unwrapped trajectory (Å, evenly spaced frames).
    species : str
        Element symbol of the mobile ions.
    method : {"displacement", "sites"}
        Resting places followed per ion (no sites needed), or sites found from
        the density of the species with hysteresis assignment.
    reference : {"framework", "all", "none"} or None
        Drift reference subtracted first (None: "framework" where other species
        exist, else "none").
    threshold_A : float, Å, optional
        Distance a settled move must exceed to count as a hop. Default:
        ``threshold_fraction`` × the typical shortest distance between distinct
        resting places seen. Must be positive and below half the smallest cell height.
    threshold_fraction : float
        Fraction used for the default threshold, in (0, 1].
    smoothing_frames : int, optional
        Running-median width (odd; 1 = none). Default: automatic.
    settle_frames : int, optional
        Consecutive frames needed at a new place. Default: automatic (1 or 2).
        Setting either of these two turns the one-frame rules off: stays
        shorter than the resolution they give are merged (A→B→C seen as A→C).
    memory_budget_MB : float
        Memory one block of atoms may use.

    Returns
    -------
    HopSummary

    Raises
    ------
    InputError
        Species absent (the message lists those present); fewer than 2 frames.
    UsageError
        Unknown method; a threshold that is not positive or not below half the
        cell; smoothing or settle values that are not whole numbers ≥ 1.

    Examples
    --------
    >>> from diffkit.synth import hopping_run
    >>> run = hopping_run(n_ions=20, n_frames=2000, vibration_rms_A=0.1, seed=1)
    >>> hops = count_hops(run.trajectory, "Li")
    >>> abs(hops.total_hops - run.truth.n_hops) < 0.1 * run.truth.n_hops
    True
    """
    if method not in HOP_METHODS:
        raise UsageError(f"count_hops: method must be one of {', '.join(HOP_METHODS)}; "
                         f"got {method!r}")
    if not isinstance(species, str):
        raise UsageError(f"count_hops: species must be one element symbol, got {species!r}")
    idx = traj.indices(species)
    n = traj.n_frames
    if n < 2:
        raise InputError(f"count_hops needs at least 2 frames; the trajectory has {n}")
    threshold_A = _check_positive("threshold_A", threshold_A)
    frac_ = _check_positive("threshold_fraction", threshold_fraction, allow_none=False)
    if frac_ > 1:
        raise UsageError(f"threshold_fraction must be in (0, 1], got {threshold_fraction!r}")
    w_user = _check_positive("smoothing_frames", smoothing_frames, integer=True)
    if w_user is not None and w_user % 2 == 0:
        raise UsageError(f"smoothing_frames must be odd (a centred window), got {w_user}")
    s_user = _check_positive("settle_frames", settle_frames, integer=True)
    if s_user is not None and s_user >= n:
        raise UsageError(f"settle_frames ({s_user}) must be smaller than the number of "
                         f"frames ({n})")
    if isinstance(memory_budget_MB, bool) or not (
            isinstance(memory_budget_MB, (int, float)) and memory_budget_MB > 0):
        raise UsageError(f"memory_budget_MB must be a positive number, got {memory_budget_MB!r}")
    cells = np.asarray(traj.cells, float)
    h_min = float(cell_heights(cells).min())
    if threshold_A is not None and threshold_A >= 0.5 * h_min:
        raise UsageError(f"threshold_A = {threshold_A:g} Å is not below half the smallest cell "
                         f"height ({0.5 * h_min:.4g} Å); a move that long cannot be told from "
                         "a periodic image")
    reference, ref_track = traj.reference_track(reference, species)
    dt = float(traj.frame_interval_ps)
    n_ions = len(idx)
    stream = _Stream(traj, idx, ref_track, memory_budget_MB)

    # ---- scouting: vibration, resting places, their distances
    b = max(_SCOUT_BLOCK_MIN, int(round(_SCOUT_BLOCK_PS / dt)))
    b = max(1, min(b, n // 8))
    lag = max(1, int(round(0.5 * _SCOUT_BLOCK_PS / dt)))
    scout = _Scout()
    lag0 = lag
    span, measured = lag, False
    for _, pos in stream():
        if not measured:
            measured = True
            # how long vibration stays correlated (frames), from the first block's ions
            xs = pos[:_SPAN_SAMPLE_FRAMES, :_SPAN_SAMPLE_IONS]
            span, _, span_profile = _vibration_span(
                xs, lag, max(lag, min(_SPAN_MAX_LAG, n // 16)))
            sig_step = span_profile[0][1] if lag == 1 and span_profile else \
                _lag_sigma(xs, 1)[0]
            if span > lag and _steps_per_span(xs, sig_step, span) > _SPAN_MAX_HOPS:
                # the lag differences grow because ions hop within a span (diffusion
                # looks like slow vibration to them): not a vibration span
                span = lag
            if span > lag:          # blocks at least one span long; σ from the plateau
                b = max(1, min(max(b, span), n // 8))
                lag = (lag, span)
        _scout_block(pos, b, lag, scout)
    counts = sum(c for _, c in scout.lag_sigma)
    sig_lag = (sum(s * c for s, c in scout.lag_sigma) / counts) if counts else 0.0
    thr0 = max(_SCOUT_Z * sig_lag, 1e-3)
    ladder = _NoiseLadder(scout.sample, sig_lag)
    sigma_vib = ladder(1)
    # correlation of the vibration between consecutive frames (0 unless the span says
    # it is correlated): v(1) = 2σ²(1 − ρ1)
    rho1, corr_span = 0.0, 1
    if span > lag0:
        corr_span = span
    if corr_span > 1 and sigma_vib > 0:
        rho1 = float(np.clip(1.0 - (sig_step / sigma_vib) ** 2, 0.0, 0.999))
    jumps = np.concatenate(scout.jumps) if scout.jumps else np.zeros(0)
    d_min = float("nan")
    basis = ""
    if len(jumps) >= 10:
        d_min = _typical_shortest(jumps)
        basis = (f"{frac_:g} × {d_min:.3g} Å, the typical shortest distance between distinct "
                 f"resting places ({len(jumps)} jumps seen while scouting)")
    else:
        starts = np.concatenate(scout.starts, axis=0)
        pair = _nearest_distinct(starts, cells[0], thr0)
        cand = np.concatenate([jumps, pair])
        if len(cand):
            d_min = _typical_shortest(cand)
            basis = (f"{frac_:g} × {d_min:.3g} Å, the typical shortest distance between "
                     f"distinct resting places ({len(jumps)} jumps and the nearest distances "
                     f"between {len(starts)} ions' resting places)")
    if threshold_A is not None:
        thr = threshold_A
        basis = "set by the user"
    elif math.isfinite(d_min):
        thr = frac_ * d_min
    else:
        thr = max(6.0 * sigma_vib, 0.5)
        basis = (f"no distinct resting places seen: 6 × the vibration rms ({sigma_vib:.3g} Å), "
                 "at least 0.5 Å")
    thr = min(thr, 0.49 * h_min)

    # ---- how many false hops the one-frame rules may add (0.02, or 1 % of the hops seen)
    auto = w_user is None and s_user is None
    allowance = max(_FALSE_HOP_FLOOR, _FALSE_HOP_SHARE * scout.hops)
    n_obs = n * n_ions
    gap = n / (1.0 + scout.hops / max(n_ions, 1))      # frames between scouted hops
    lookahead = int(np.clip(gap, 8, 256))
    excursion = float("nan")
    sep = d_min if (threshold_A is None and math.isfinite(d_min)) else thr / frac_

    if method == "displacement":
        # the tracker at the finest resolution vibration will not fool (whole-run budget
        # 0.1), then one-frame stays recovered on the raw positions
        w, settle = _choose_resolution(ladder, thr, n_obs, n, w_user, s_user)
        excursion = _excursion_radius(n_obs, sigma_vib, allowance, rho1)
        # worth it only where one frame at the nearest other resting place can be
        # told from vibration (R below the typical distance between resting places)
        refine = auto and (w, settle) != (1, 1) and 0 < excursion < sep
        if not refine:
            excursion = float("nan")
        out = _census_displacement(stream, thr, w, settle, lookahead,
                                   reach=excursion if refine else None,
                                   delta=w // 2 + settle + 1, span=corr_span)
        res_frames = 1 if refine else max(settle, (w + 1) // 2)
    else:
        # sites: peaks of the density; the core radius from the allowance, every raw
        # frame assigned; smoothing only where vibration is too wide for that
        locator, d_nn, r_max, neighbour, weight = _build_sites(stream, cells, sigma_vib, thr,
                                                               sep)
        core = r_max
        w = settle = 0
        if auto:
            r_c, _ = _core_radius(neighbour, weight, sigma_vib, n_obs, allowance, r_max, rho1)
            if r_c >= _MIN_CORE_SIGMAS * sigma_vib:
                core, w, settle = r_c, 1, 1
        if not w:
            w, settle = _choose_resolution(ladder, d_nn - core, n_obs, n, w_user, s_user)
        locator.core = float(core)
        # a hop walks back over the frames already nearer the new site: with correlated
        # vibration an ion can stay outside the new core for several spans after arriving
        out = _census_sites(stream, locator, w, settle, cells,
                            max(_WALK_BACK_FRAMES, _WALK_BACK_SPANS * span))
        res_frames = max(settle, (w + 1) // 2)

    # ---- the census
    hop_f, hop_i, hop_vec, disp, site_info = out
    order = np.lexsort((hop_i, hop_f))
    hop_f, hop_i, hop_vec = hop_f[order], hop_i[order], hop_vec[order]
    jumps_A = np.sqrt(np.einsum("ij,ij->i", hop_vec, hop_vec)) if len(hop_vec) else np.zeros(0)
    total_hops = int(len(hop_f))
    per_ion = np.bincount(np.searchsorted(idx, hop_i), minlength=n_ions).astype(int)
    a = float(np.mean(jumps_A)) if total_hops else float("nan")
    tsd = float(np.sum(disp * disp))
    n_eff = tsd / (a * a) if total_hops and a > 0 else 0.0
    duration = float(traj.duration_ps)
    sites = None
    if method == "sites":
        hf, ht, occupancy = site_info
        hf, ht = hf[order], ht[order]
        if total_hops:
            key = hf.astype(np.int64) * locator.n + ht
            uk, cnt = np.unique(key, return_counts=True)
            pf, pt = uk // locator.n, uk % locator.n
        else:
            pf = pt = cnt = np.zeros(0, int)
        sites = SiteCensus(
            site_positions_A=locator.cart, core_radius_A=float(core),
            nearest_site_distance_A=float(d_nn), site_occupancy=occupancy,
            pair_from_site=pf.astype(int), pair_to_site=pt.astype(int),
            pair_hops=cnt.astype(int), hop_from_site=hf, hop_to_site=ht)
    msg = _message(species, total_hops, per_ion, n_ions, duration, thr, res_frames, dt)
    return HopSummary(
        species=species, method=method, reference=reference, n_ions=n_ions,
        ion_indices=np.asarray(idx, int), n_frames=n, frame_interval_ps=dt,
        duration_ps=duration, total_hops=total_hops, hops_per_ion=per_ion,
        fraction_ions_hopped=float(np.mean(per_ion > 0)),
        hop_rate_per_ion_per_ps=(total_hops / (n_ions * duration) if duration > 0 else 0.0),
        mean_jump_distance_A=a, total_squared_displacement_A2=tsd, n_effective_hops=n_eff,
        hop_times_ps=np.asarray(traj.times_ps, float)[hop_f], hop_frames=hop_f,
        hop_ions=hop_i, hop_jump_distances_A=jumps_A, threshold_A=float(thr),
        threshold_basis=basis, resting_place_distance_A=float(d_min), smoothing_frames=int(w),
        settle_frames=int(settle),
        time_resolution_ps=float(res_frames * dt), vibration_rms_A=float(sigma_vib),
        max_frame_step_A=float(scout.max_step), sites=sites, message=msg,
        excursion_radius_A=float(excursion), false_hop_allowance=float(allowance),
        vibration_span_frames=int(span), vibration_step_correlation=float(rho1))


def _choose_resolution(ladder, reach, n_obs, n, w_user, s_user):
    """Finest (running-median width, settle frames) that vibration will not fool.

    Tried in order of resolution: (1, 1), (3, 2), (5, 2), (7, 2), ...; the
    first whose expected false hops over the run is ≤ ``_FALSE_HOP_BUDGET`` wins.
    """
    if w_user is not None and s_user is not None:
        return w_user, s_user
    if w_user is not None:
        ok1 = w_user == 1 and _expected_false_hops(n_obs, reach, ladder(1), 1) \
            <= _FALSE_HOP_BUDGET
        return w_user, (1 if ok1 else min(2, n - 1))
    cap = max(1, n // 4)
    tries = [(1, s_user or 1)] + [(w, s_user or 2) for w in _WINDOWS[1:] if w <= cap]
    for w, s in tries:
        if _expected_false_hops(n_obs, reach, ladder(w), s) <= _FALSE_HOP_BUDGET:
            return w, min(s, max(1, n - 1))
    w, s = tries[-1]
    return w, min(s, max(1, n - 1))


def _census_displacement(stream, thr, w, settle, lookahead, reach=None, delta=0, span=1):
    hop_f, hop_i, hop_vec, disp = [], [], [], []
    for ids, pos in stream():
        m = running_median(pos, w)
        frames, ions = _follow_resting_places(m, thr, settle, lookahead,
                                              min_anchor=_FIRST_ANCHOR_SPANS * span
                                              if span > 1 else 1)
        centres, first, lengths, sid = _stay_centres(m, frames, ions, thr)
        if reach is None:
            counts = np.bincount(ions, minlength=len(ids))
            if len(frames):
                rows = _hop_rows(first, ions)
                hop_vec.append(centres[rows + 1] - centres[rows])
            hop_f.append(frames)
            hop_i.append(ids[ions])
            disp.append(centres[first + counts] - centres[first])
            continue
        label, places = _refine_stays(pos, frames, ions, centres, first, lengths, sid, thr,
                                      reach, delta, span)
        ci, ct = np.nonzero(label[:, 1:] != label[:, :-1])
        hop_vec.append(places[label[ci, ct + 1]] - places[label[ci, ct]])
        hop_f.append(ct + 1)
        hop_i.append(ids[ci])
        disp.append(places[label[:, -1]] - places[label[:, 0]])
    return (np.concatenate(hop_f).astype(int), np.concatenate(hop_i).astype(int),
            np.concatenate(hop_vec) if hop_vec else np.zeros((0, 3)),
            np.concatenate(disp), None)


def _census_sites(stream, locator, w, settle, cells, back_frames):
    n = stream.n_frames
    const_cell = bool(np.allclose(cells, cells[:1]))
    inv_cells = None if const_cell else np.linalg.inv(cells)
    occupancy = np.zeros(locator.n)
    hop_f, hop_i, hop_vec, hop_from, hop_to, disp = [], [], [], [], [], []
    for ids, pos in stream():
        m = running_median(pos, w)
        lab = locator.core_site(m, inv_cells)
        dec = lab >= 0
        net = np.zeros((len(ids), 3))
        for j in range(len(ids)):
            fr, fa, ta, first_site = _site_changes(lab[:, j], dec[:, j], settle)
            if first_site < 0:
                continue
            if back_frames and len(fr):
                fr = _walk_back(m[:, j], fr, fa, ta, locator, inv_cells, back_frames)
            v = locator.min_image(locator.cart[ta] - locator.cart[fa])
            hop_f.append(fr)
            hop_i.append(np.full(len(fr), ids[j]))
            hop_vec.append(v)
            hop_from.append(fa)
            hop_to.append(ta)
            net[j] = v.sum(axis=0)
            bounds = np.concatenate([[0], fr, [n]])
            np.add.at(occupancy, np.concatenate([[first_site], ta]), np.diff(bounds) / n)
        disp.append(net)
    cat = (lambda parts, dt: np.concatenate(parts).astype(dt) if parts else np.zeros(0, dt))
    return (cat(hop_f, int), cat(hop_i, int),
            np.concatenate(hop_vec) if hop_vec else np.zeros((0, 3)), np.concatenate(disp),
            (cat(hop_from, int), cat(hop_to, int), occupancy))


def _walk_back(x, frames, from_site, to_site, locator, inv_cells, back_frames):
    """Move each hop back to the start of the frames that were already nearer the new site.

    A hop is decided when the ion enters the core of the new site; the frames
    just before, outside both cores but nearer the new site than the old one,
    already belong to the new stay. The hop moves back over them (at most
    ``back_frames``, never onto or before the previous hop's frame).

    Parameters
    ----------
    x : (n_frames, 3) float, Å
        Positions of one ion (as assigned).
    frames, from_site, to_site : (n_hops,) int
    locator : _SiteLocator
    inv_cells : (n_frames, 3, 3) float or None
    back_frames : int

    Returns
    -------
    (n_hops,) int
        Re-timed hop frames.
    """
    prev = np.r_[0, frames[:-1]]
    T = frames[:, None] - np.arange(1, back_frames + 1)[None, :]      # (h, J)
    ok = T > prev[:, None]
    Tc = np.maximum(T, 0)
    xt = x[Tc]
    if inv_cells is None:
        f = xt @ locator.inv
    else:
        f = np.einsum("hja,hjab->hjb", xt, inv_cells[Tc])

    def d2(site):
        d = f - locator.frac[site][:, None, :]
        d -= np.round(d)
        d = d @ locator.cell
        return np.einsum("hji,hji->hj", d, d)

    nearer_new = (d2(to_site) < d2(from_site)) & ok
    back = np.cumprod(nearer_new, axis=1).sum(axis=1)
    return frames - back


def _message(species, total, per_ion, n_ions, duration, thr, res_frames, dt):
    if total == 0:
        return (f"No {species} hop longer than {thr:.3g} Å was seen in {duration:g} ps "
                f"({n_ions} ions).")
    movers = int(np.sum(per_ion > 0))
    stays = ("stays down to one frame are counted" if res_frames <= 1 else
             f"stays shorter than {res_frames * dt:.3g} ps are merged")
    text = (f"{total} {species} hops by {movers} of {n_ions} ions in {duration:g} ps "
            f"(threshold {thr:.3g} Å; {stays}).")
    if movers <= 2 and n_ions > 2:
        text += f" Only {movers} ion(s) moved: the diffusion seen is carried by very few ions."
    return text
