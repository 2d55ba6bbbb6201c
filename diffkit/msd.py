"""Time-origin-averaged mean-squared displacement (MSD) by FFT.

For one atom and one axis with positions x(0..N-1) the MSD at a lag of m
frames, averaged over all N - m time origins, splits into

    MSD(m) = S1(m) - 2 S2(m),
    S1(m)  = [sum_{t<N-m} x(t)^2 + sum_{t>=m} x(t)^2] / (N - m),
    S2(m)  = sum_{t<N-m} x(t) x(t+m) / (N - m),

where S2 is an autocorrelation computed by FFT with zero padding and S1 by
cumulative sums of the squared coordinates (Futrelle & McGinty, Chem. Phys.
Lett. 12, 285 (1971); Allen & Tildesley, *Computer Simulation of Liquids*,
FFT method; see docs/methods_diffusion.md). Each atom's mean position is
subtracted before the FFT so that round-off scales with the spread of the path
rather than with its distance from the origin. Cross terms x_a(t) x_b(t+m)
give the full 3x3 MSD tensor the same way.

Positions are read in blocks of atoms (:meth:`Trajectory.iter_atom_blocks`),
so memory does not grow with the number of atoms. Drift is removed through
the ``reference=`` option (DESIGN.md) and the choice is recorded in the result.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

import numpy as np
from scipy import fft as _fft

from .errors import InputError, UsageError

__all__ = ["MSDCurve", "ChargeMSDCurve", "compute_msd", "compute_charge_msd", "thinned_lags"]

#: Atoms read and transposed together (at least; short runs take more).
_ATOMS_PER_BLOCK = 8
#: Atoms transformed together; 4-16 was fastest in a feasibility run.
_ATOMS_PER_FFT = 8
#: Frames per tile of the cache-friendly transpose in :func:`_frames_last`.
_TRANSPOSE_TILE = 2048
#: At most this many (ion, time origin) samples per lag enter alpha2.
_ALPHA2_SAMPLES = 2 ** 20
#: Working float64 copies of one block per atom-frame-axis (for memory sizing).
_COPIES = 8


def _as_dict(obj):
    out = {}
    for f in dataclasses.fields(obj):
        v = getattr(obj, f.name)
        if isinstance(v, np.ndarray):
            v = v.tolist()
        elif isinstance(v, tuple):
            v = [x.tolist() if isinstance(x, np.ndarray) else x for x in v]
        elif isinstance(v, (np.floating, np.integer)):
            v = v.item()
        out[f.name] = v
    return out


def thinned_lags(max_lag, *, n_dense=16, n_log=48, n_linear=48):
    """A sparse grid of lags (in frames) for per-ion curves and alpha2.

    Every lag up to ``n_dense``, plus geometrically and linearly spaced lags up
    to ``max_lag``, merged and sorted.

    Parameters
    ----------
    max_lag : int
        Largest lag, frames (>= 1).

    Returns
    -------
    (n_thin,) int
        Sorted, unique lags in ``1..max_lag``.
    """
    max_lag = int(max_lag)
    if max_lag < 1:
        return np.zeros(0, dtype=int)
    dense = np.arange(1, min(n_dense, max_lag) + 1)
    geo = np.round(np.geomspace(1, max_lag, n_log)).astype(int)
    lin = np.round(np.linspace(0, max_lag, n_linear + 1)[1:]).astype(int)
    lags = np.unique(np.concatenate([dense, geo, lin]))
    return lags[(lags >= 1) & (lags <= max_lag)]


@dataclass(frozen=True, repr=False)
class MSDCurve:
    """Time-origin-averaged MSD of one species (or a group of species).

    Attributes
    ----------
    species : tuple of str
        Element symbols averaged over.
    reference : str
        Drift reference used: "framework", "all" or "none".
    n_ions : int
        Number of atoms averaged over.
    ion_indices : (n_ions,) int
        Their atom indices in the trajectory.
    frame_interval_ps : float, ps
    n_frames : int
    duration_ps : float, ps
        Time between first and last frame.
    temperature_K : float or None, K
    mean_volume_A3 : float, Å^3
        Mean cell volume of the run.
    lag_ps : (n_lags,) float, ps
        Lag times 0, dt, 2 dt, ... up to ``max_lag_fraction`` of the run.
    msd_A2 : (n_lags,) float, Å^2
        MSD averaged over all time origins and all ions.
    msd_axes_A2 : (n_lags, 3) float, Å^2
        x, y, z components (they sum to ``msd_A2``).
    msd_tensor_A2 : (n_lags, 3, 3) float, Å^2, or None
        <Δr_a Δr_b>; None when computed with ``tensor=False``.
    collective_A2 : (n_lags,) float, Å^2
        MSD of the summed displacement of all ions, divided by ``n_ions``.
    collective_axes_A2 : (n_lags, 3) float, Å^2
    n_origins : (n_lags,) int
        Time origins per ion at each lag (n_frames - lag).
    ion_lag_index : (n_thin,) int
        Indices into ``lag_ps`` of the thinned grid used for per-ion data.
    ion_msd_A2 : (n_ions, n_thin) float, Å^2, or None
        Per-ion time-origin-averaged MSD on the thinned grid (all origins).
    alpha2_lag_index : (n_a,) int
        Indices into ``lag_ps`` of the (sparser) grid of the non-Gaussian parameter.
    msd4_A4 : (n_a,) float, Å^4, or None
        <|Δr|^4> on that grid (direct sum over a strided set of origins).
    alpha2 : (n_a,) float, or None
        Non-Gaussian parameter 3<r^4>/(5<r^2>^2) - 1 on that grid.
    summed_displacement_A : (n_frames, 3) float, Å
        Sum over ions of r_i(t) - r_i(0), drift reference removed.
    """

    species: tuple
    reference: str
    n_ions: int
    ion_indices: np.ndarray
    frame_interval_ps: float
    n_frames: int
    duration_ps: float
    temperature_K: float | None
    mean_volume_A3: float
    lag_ps: np.ndarray
    msd_A2: np.ndarray
    msd_axes_A2: np.ndarray
    msd_tensor_A2: np.ndarray | None
    collective_A2: np.ndarray
    collective_axes_A2: np.ndarray
    n_origins: np.ndarray
    ion_lag_index: np.ndarray
    ion_msd_A2: np.ndarray | None
    alpha2_lag_index: np.ndarray
    msd4_A4: np.ndarray | None
    alpha2: np.ndarray | None
    summed_displacement_A: np.ndarray

    @property
    def ion_lag_ps(self):
        """(n_thin,) float, ps: lags of the per-ion curves and alpha2."""
        return self.lag_ps[self.ion_lag_index]

    @property
    def alpha2_lag_ps(self):
        """(n_a,) float, ps: lags of alpha2 and msd4_A4."""
        return self.lag_ps[self.alpha2_lag_index]

    @property
    def has_per_ion(self):
        """True when per-ion curves were computed."""
        return self.ion_msd_A2 is not None

    def to_dict(self):
        """Plain-Python dict for JSON (arrays become lists)."""
        return _as_dict(self)

    def __repr__(self):
        i = min(len(self.lag_ps) - 1, max(1, len(self.lag_ps) // 2))
        return (f"MSDCurve(species={'+'.join(self.species)}, n_ions={self.n_ions}, "
                f"reference={self.reference!r}, lags={len(self.lag_ps)} up to "
                f"{self.lag_ps[-1]:g} ps, msd({self.lag_ps[i]:g} ps)={self.msd_A2[i]:.4g} Å², "
                f"per_ion={self.has_per_ion}, T={self.temperature_K} K)")


@dataclass(frozen=True, repr=False)
class ChargeMSDCurve:
    """Charge-weighted collective MSD of several species together.

    ``charge_msd_e2A2[m]`` is < |sum_i q_i (r_i(t+m) - r_i(t))|^2 > averaged
    over time origins (not divided by anything), in e^2 Å^2; its slope over
    6 V k_B T is the conductivity (Nernst–Einstein without the Haven ratio).

    Attributes
    ----------
    charges_e : dict of str to float, e
        Charge per species used.
    n_atoms_by_species : dict of str to int
    net_charge_e : float, e
        Sum of the charges of all included atoms. When it is zero the curve
        does not depend on the drift reference.
    reference : str
    frame_interval_ps, n_frames, duration_ps, temperature_K, mean_volume_A3
        As in :class:`MSDCurve`.
    lag_ps : (n_lags,) float, ps
    charge_msd_e2A2 : (n_lags,) float, e^2 Å^2
    charge_msd_axes_e2A2 : (n_lags, 3) float, e^2 Å^2
    n_origins : (n_lags,) int
    charge_displacement_eA : (n_frames, 3) float, e Å
        sum_i q_i (r_i(t) - r_i(0)), drift reference removed (for time blocking).
    """

    charges_e: dict
    n_atoms_by_species: dict
    net_charge_e: float
    reference: str
    frame_interval_ps: float
    n_frames: int
    duration_ps: float
    temperature_K: float | None
    mean_volume_A3: float
    lag_ps: np.ndarray
    charge_msd_e2A2: np.ndarray
    charge_msd_axes_e2A2: np.ndarray
    n_origins: np.ndarray
    charge_displacement_eA: np.ndarray

    def to_dict(self):
        """Plain-Python dict for JSON (arrays become lists)."""
        return _as_dict(self)

    def __repr__(self):
        q = ", ".join(f"{s}:{c:+g}" for s, c in self.charges_e.items())
        return (f"ChargeMSDCurve(charges={{{q}}}, net={self.net_charge_e:+g} e, "
                f"reference={self.reference!r}, lags={len(self.lag_ps)} up to "
                f"{self.lag_ps[-1]:g} ps)")


# --------------------------------------------------------------------------- helpers
def _check_traj(traj, max_lag_fraction):
    if traj.n_frames < 2:
        raise InputError(f"an MSD needs at least 2 frames; the trajectory has {traj.n_frames}")
    if not (0 < max_lag_fraction <= 1):
        raise UsageError(f"max_lag_fraction must be in (0, 1], got {max_lag_fraction}")
    max_lag = int(np.floor(max_lag_fraction * (traj.n_frames - 1)))
    return max(1, max_lag)


def _species_list(traj, species):
    if isinstance(species, str):
        species = [species]
    species = [str(s) for s in species]
    if not species:
        raise UsageError("compute_msd: give at least one species symbol")
    idx = np.concatenate([traj.indices(s) for s in species])  # InputError lists those present
    if len(np.unique(idx)) != len(idx):
        raise UsageError(f"species listed twice: {species}")
    return tuple(species), np.sort(idx)


def _block_size(traj, memory_budget_MB):
    if not memory_budget_MB > 0:
        raise UsageError(f"memory_budget_MB must be positive, got {memory_budget_MB}")
    # short runs: larger blocks keep the per-block overhead down (the cache-friendly
    # size of ~8 atoms matters only for long runs)
    preferred = max(_ATOMS_PER_BLOCK, 2 ** 18 // max(traj.n_frames, 1))
    return max(1, min(preferred, traj.block_size_for(memory_budget_MB, copies=_COPIES)))


def _s1(cum, lags, n):
    """S1 sums (not yet divided by N - m) from cumulative sums along the last axis.

    cum[..., t] = sum_{u<=t} q(u); returns sum_{t<N-m} q + sum_{t>=m} q for each lag.
    """
    total = cum[..., -1:]
    head = cum[..., n - 1 - lags]                       # sum_{t <= N-m-1}
    before = np.where(lags > 0, cum[..., np.maximum(lags - 1, 0)], 0.0)
    return head + (total - before)


def _frames_last(pos, buffer=None, width=None):
    """Copy (n, k, 3) positions into a (k, 3, width) array, frames last, tile by tile.

    Columns ``n..width-1`` are zero (the FFT's padding). A plain
    ``ascontiguousarray(pos.transpose(1, 2, 0))`` walks the output with a stride
    of n and was ~3x slower than copying tiles that fit in cache.

    Parameters
    ----------
    pos : (n, k, 3) float
    buffer : (k, 3, width) float, optional
        Reused when given (its padding columns must already be zero).
    width : int, optional
        Length of the last axis (>= n); n by default.

    Returns
    -------
    (k, 3, width) float, C-contiguous
    """
    n, k, _ = pos.shape
    width = n if width is None else width
    if buffer is None or buffer.shape != (k, 3, width):
        buffer = np.zeros((k, 3, width))
    flat = buffer.reshape(k * 3, width)
    for a in range(0, n, _TRANSPOSE_TILE):
        b = min(n, a + _TRANSPOSE_TILE)
        flat[:, a:b] = pos[a:b].reshape(b - a, k * 3).T
    return buffer


def _pair_sums(v):
    """Sum adjacent pairs along the last axis: re^2 + im^2 (or re_a re_b + im_a im_b)
    from a float view of complex spectra."""
    return v[..., 0::2] + v[..., 1::2]


def _msd_of_track(track, max_lag):
    """Per-axis time-origin-averaged MSD of one (n_frames, 3) track, by FFT.

    Returns (max_lag + 1, 3) float.
    """
    n = track.shape[0]
    x = np.ascontiguousarray((track - track.mean(axis=0)).T)      # (3, n)
    nfft = _fft.next_fast_len(n + max_lag, real=True)
    f = _fft.rfft(x, n=nfft, axis=-1)
    s2 = _fft.irfft(f.real ** 2 + f.imag ** 2, n=nfft, axis=-1)[:, :max_lag + 1]
    lags = np.arange(max_lag + 1)
    s1 = _s1(np.cumsum(x * x, axis=-1), lags, n)
    return ((s1 - 2.0 * s2) / (n - lags)).T


# --------------------------------------------------------------------------- main entry
def compute_msd(traj, species, *, reference=None, max_lag_fraction=0.5, per_ion=True,
                tensor=True, memory_budget_MB=256.0, alpha2_origin_density=4):
    """Time-origin-averaged MSD of a species, by FFT, streamed over atom blocks.

    Parameters
    ----------
    traj : Trajectory
        Unwrapped trajectory (positions in Å, evenly spaced frames).
    species : str or sequence of str
        Element symbol(s) of the ions to average over.
    reference : {"framework", "all", "none"} or None
        Drift reference subtracted from every position before the MSD
        (DESIGN.md); None picks "framework" where other species exist, else
        "none". Recorded in the result.
    max_lag_fraction : float
        Largest lag kept, as a fraction of the run (0 < f <= 1).
    per_ion : bool
        Also compute per-ion curves on a thinned lag grid (needed for ion-based
        error bars) and the non-Gaussian parameter on a sparser grid.
    tensor : bool
        Also compute the off-diagonal MSD tensor components.
    memory_budget_MB : float
        Memory one block of atoms and its working copies may use.
    alpha2_origin_density : int
        For alpha2 at lag m, time origins are taken every max(1, m // density)
        frames (direct sum; origins closer than the lag add little), and
        sparser still if that gives more than 2**20 (ion, origin) samples.

    Returns
    -------
    MSDCurve

    Raises
    ------
    InputError
        Species not present (the message lists those present), fewer than 2 frames.
    UsageError
        Nonsense options.
    """
    max_lag = _check_traj(traj, max_lag_fraction)
    species, idx = _species_list(traj, species)
    reference, ref_track = traj.reference_track(reference, species)
    n = traj.n_frames
    n_ions = len(idx)
    lags = np.arange(max_lag + 1)
    thin = thinned_lags(max_lag)
    nfft = _fft.next_fast_len(n + max_lag, real=True)
    pairs = ((0, 1), (0, 2), (1, 2))

    a2_lags = thinned_lags(max_lag, n_dense=8, n_log=24, n_linear=0)
    power_sum = np.zeros((3, nfft // 2 + 1))
    cross_spec = np.zeros((3, nfft // 2 + 1)) if tensor else None
    sq_diag = np.zeros((3, n))                     # sum over atoms of x_a(t)^2
    sq_cross = np.zeros((3, n)) if tensor else None  # ... of x_a(t) x_b(t), pairs as above
    summed = np.zeros((3, n))                 # transposed to (n, 3) at the end
    ion_msd = np.empty((n_ions, len(thin))) if per_ion else None
    r2_sum = np.zeros(len(a2_lags))
    r4_sum = np.zeros(len(a2_lags))
    cnt = np.zeros(len(a2_lags))
    # origins for alpha2: every max(1, m // density) frames, and no more than
    # _ALPHA2_SAMPLES (ion, origin) pairs per lag, so the cost stays bounded
    strides = np.maximum.reduce([
        np.ones_like(a2_lags), a2_lags // max(1, int(alpha2_origin_density)),
        ((n - a2_lags) * n_ions) // _ALPHA2_SAMPLES])

    done = 0
    padded = None
    bs = _block_size(traj, memory_budget_MB)
    for _, pos in traj.iter_atom_blocks(idx, block_size=bs):
        k = pos.shape[1]
        padded = _frames_last(pos, padded, nfft)                  # (k, 3, nfft), zero tail
        x = padded[..., :n]
        if reference != "none":
            x -= ref_track.T                                      # drift reference, (3, n)
        block_sum = x.sum(axis=0)                                 # (3, n)
        summed += block_sum - block_sum[:, :1]
        x -= x.mean(axis=-1, keepdims=True)
        sq_diag += np.einsum("kat,kat->at", x, x)
        if tensor:
            for j, (a, b) in enumerate(pairs):
                sq_cross[j] += np.einsum("kt,kt->t", x[:, a], x[:, b])
        for lo in range(0, k, _ATOMS_PER_FFT):
            xs = x[lo:lo + _ATOMS_PER_FFT]
            ks = xs.shape[0]
            f = _fft.rfft(padded[lo:lo + ks], axis=-1)            # (ks, 3, nf) complex
            fv = f.view(np.float64)                               # re, im interleaved
            if tensor:
                for j, (a, b) in enumerate(pairs):
                    cross_spec[j] += _pair_sums(np.einsum("kf,kf->f", fv[:, a], fv[:, b]))
            np.square(fv, out=fv)
            power_sum += _pair_sums(fv.sum(axis=0))               # atoms summed before the inverse FFT
            if per_ion:
                power_ion = _pair_sums(fv.sum(axis=1))            # (ks, nf)
                del f, fv
                s2 = _fft.irfft(power_ion, n=nfft, axis=-1)[:, thin]   # (ks, n_thin)
                s1 = _s1(np.cumsum(np.einsum("kat,kat->kt", xs, xs), axis=-1), thin, n)
                ion_msd[done + lo:done + lo + ks] = np.maximum((s1 - 2.0 * s2) / (n - thin), 0.0)
            else:
                del f, fv
        if per_ion:
            for j, (m, st) in enumerate(zip(a2_lags, strides)):
                d = x[:, :, m::st] - x[:, :, :n - m:st]
                r2 = np.einsum("kat,kat->kt", d, d)
                r2_sum[j] += r2.sum()
                r4_sum[j] += np.einsum("kt,kt->", r2, r2)
                cnt[j] += r2.size
        done += k
        del x, pos, block_sum

    s2_all = _fft.irfft(power_sum, n=nfft, axis=-1)[:, :max_lag + 1]
    s1_all = _s1(np.cumsum(sq_diag, axis=-1), lags, n)
    norm = n_ions * (n - lags)
    msd_axes = ((s1_all - 2.0 * s2_all) / norm).T                 # (L, 3)
    msd_axes = np.maximum(msd_axes, 0.0)          # round-off only: an MSD is never negative
    msd_tensor = None
    if tensor:
        cross = _fft.irfft(cross_spec, n=nfft, axis=-1)[:, :max_lag + 1]
        msd_tensor = np.zeros((max_lag + 1, 3, 3))
        for a in range(3):
            msd_tensor[:, a, a] = msd_axes[:, a]
        for j, (a, b) in enumerate(pairs):
            s1_ab = _s1(np.cumsum(sq_cross[j]), lags, n)
            v = (s1_ab - 2.0 * cross[j]) / norm
            msd_tensor[:, a, b] = msd_tensor[:, b, a] = v
    summed = summed.T.copy()
    coll_axes = _msd_of_track(summed, max_lag) / n_ions
    alpha2 = msd4 = None
    if per_ion and len(a2_lags):
        mean_r2 = r2_sum / cnt
        msd4 = r4_sum / cnt
        with np.errstate(divide="ignore", invalid="ignore"):
            alpha2 = np.where(mean_r2 > 0, 3.0 * msd4 / (5.0 * mean_r2 ** 2) - 1.0, np.nan)
    dt = float(traj.frame_interval_ps)
    return MSDCurve(
        species=species, reference=reference, n_ions=n_ions, ion_indices=idx,
        frame_interval_ps=dt, n_frames=n, duration_ps=float(traj.duration_ps),
        temperature_K=traj.temperature_K, mean_volume_A3=float(traj.mean_volume_A3),
        lag_ps=lags * dt, msd_A2=msd_axes.sum(axis=1), msd_axes_A2=msd_axes,
        msd_tensor_A2=msd_tensor, collective_A2=coll_axes.sum(axis=1),
        collective_axes_A2=coll_axes, n_origins=(n - lags).astype(int), ion_lag_index=thin,
        ion_msd_A2=ion_msd, alpha2_lag_index=a2_lags, msd4_A4=msd4, alpha2=alpha2,
        summed_displacement_A=summed)


def compute_charge_msd(traj, charges, *, reference=None, max_lag_fraction=0.5,
                       memory_budget_MB=256.0):
    """Charge-weighted collective MSD of several species together.

    Computes < |sum_i q_i Δr_i(t)|^2 > over time origins for every atom of the
    species named in ``charges``. If the included atoms are charge neutral
    (net charge zero) the result does not depend on the drift reference;
    otherwise the reference matters and is recorded.

    Parameters
    ----------
    traj : Trajectory
    charges : dict of str to float, e
        Charge of each species to include, in elementary charges (from the
        caller; diffkit does not guess them here).
    reference : {"framework", "all", "none"} or None
        Drift reference; None picks "framework" where species outside
        ``charges`` exist, else "none".
    max_lag_fraction : float
    memory_budget_MB : float

    Returns
    -------
    ChargeMSDCurve
    """
    if not isinstance(charges, dict) or not charges:
        raise UsageError("compute_charge_msd: charges must be a non-empty dict "
                         "of species symbol to charge in e, e.g. {'Li': 1, 'Na': 1}")
    max_lag = _check_traj(traj, max_lag_fraction)
    q = {}
    for s, c in charges.items():
        try:
            c = float(c)
        except (TypeError, ValueError):
            raise UsageError(f"charge of {s!r} must be a number of e, got {c!r}") from None
        if not np.isfinite(c):
            raise UsageError(f"charge of {s!r} must be finite, got {c!r}")
        q[str(s)] = c
    species, idx = _species_list(traj, list(q))
    reference, ref_track = traj.reference_track(reference, species)
    qa = np.empty(traj.n_atoms)
    for s in species:
        qa[traj.indices(s)] = q[s]
    n = traj.n_frames
    total = np.zeros((n, 3))
    bs = _block_size(traj, memory_budget_MB)
    for block, pos in traj.iter_atom_blocks(idx, block_size=bs):
        total += np.einsum("tka,k->ta", pos - ref_track[:, None, :], qa[block])
    axes = _msd_of_track(total, max_lag)
    lags = np.arange(max_lag + 1)
    dt = float(traj.frame_interval_ps)
    counts = {s: int(len(traj.indices(s))) for s in species}
    return ChargeMSDCurve(
        charges_e=q, n_atoms_by_species=counts,
        net_charge_e=float(sum(q[s] * counts[s] for s in species)), reference=reference,
        frame_interval_ps=dt, n_frames=n, duration_ps=float(traj.duration_ps),
        temperature_K=traj.temperature_K, mean_volume_A3=float(traj.mean_volume_A3),
        lag_ps=lags * dt, charge_msd_e2A2=np.maximum(axes.sum(axis=1), 0.0),
        charge_msd_axes_e2A2=np.maximum(axes, 0.0), n_origins=(n - lags).astype(int),
        charge_displacement_eA=total - total[:1])
