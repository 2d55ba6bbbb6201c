"""Trajectories whose right answer is known exactly.

Three physical models, each returned with its ground truth:

* :func:`hopping_run` — non-interacting ions hopping between sites with
  Arrhenius rates, exponential residence times (a continuous-time Poisson
  process) and Gaussian thermal vibration about the site — independent from
  frame to frame, or (``vibration_period_frames``) a damped oscillator driven
  by noise, correlated in time as in MD saved every few femtoseconds
  (stationary AR(2) process; Box & Jenkins, *Time Series Analysis*, ch. 3);
  optional immobile framework atoms that vibrate too. D is exact: D = Γ_total a² / (2d) on a
  Bravais lattice of sites (Einstein relation; Mehrer, *Diffusion in Solids*,
  Springer 2007, ch. 4), and for a general periodic site network it is
  computed exactly by :func:`network_diffusion_tensor`.
* :func:`vacancy_kmc_run` — single-vacancy kinetic Monte Carlo, every atom a
  tracer, many independent replicas; the truth is the *uncorrelated* tracer D,
  so D_measured / D_truth is the tracer correlation factor f (Compaan & Haven,
  Trans. Faraday Soc. 52, 786 (1956)).
* :func:`arrhenius_campaign` — one hopping run per temperature with the exact
  D(T) = D0 exp(−Ea / k_B T) and its value at 300 K.

:func:`write_run` writes a run to XDATCAR, LAMMPS text dump or extended XYZ
with a run card beside it, so that the same ground truth exercises the readers.

Everything is seeded (``numpy.random.default_rng`` / ``SeedSequence``) and
vectorised. Units: Å, ps, eV, K; rates in 1/ps (1 THz = 1/ps).
"""

from __future__ import annotations

import itertools
import math
import os
import warnings
from dataclasses import dataclass

import numpy as np

from .errors import DiffkitWarning, UsageError
from .trajectory import Trajectory
from .units import K_B_EV_PER_K, a2ps_to_cm2s

__all__ = [
    "GroundTruth",
    "SyntheticRun",
    "CampaignTruth",
    "hopping_run",
    "vacancy_kmc_run",
    "arrhenius_campaign",
    "network_diffusion_tensor",
    "ar2_autocorrelation",
    "write_run",
    "HOPPING_LATTICES",
    "VACANCY_LATTICES",
    "VACANCY_CORRELATION_FACTORS",
]

#: Lattices of :func:`hopping_run`.
HOPPING_LATTICES = ("sc", "square", "sites")
#: Lattices of :func:`vacancy_kmc_run`.
VACANCY_LATTICES = ("sc", "bcc", "fcc", "square", "triangular")
#: Tracer correlation factors of the single-vacancy mechanism in the dilute
#: limit (Compaan & Haven, Trans. Faraday Soc. 52, 786 (1956); tabulated in
#: Mehrer, Diffusion in Solids, 2007, ch. 7). For users' checks; the tests
#: carry their own copy of these published values.
VACANCY_CORRELATION_FACTORS = {"square": 0.46694, "triangular": 0.56006, "sc": 0.65311,
                               "bcc": 0.72719, "fcc": 0.78145}

# a run with more hops than this would need gigabytes just for the hop list
_MAX_HOPS = 30_000_000


# --------------------------------------------------------------------------- results
@dataclass(frozen=True, eq=False, repr=False)
class GroundTruth:
    """The exact answer a synthetic run was built to have.

    Attributes
    ----------
    D_A2_per_ps, D_cm2_per_s : float or None
        Exact tracer diffusion coefficient of the model (for the vacancy model:
        the *uncorrelated* tracer D, so that D_measured / D = f). None where the
        model has no exactly known D.
    rate_per_direction_per_ps : float, 1/ps
        Γ, the jump rate of one ion in one jump direction (vacancy model: the mean
        over tracers, w / (N − 1); the exchange rate w is
        ``vacancy_exchange_rate_per_ps``).
    total_rate_per_ps : float, 1/ps
        Γ_total = z·Γ, the total jump rate of one ion (mean over sites where z varies).
        D = Γ_total a² / (2d) for the Bravais lattices and the vacancy model.
    jump_distance_A : float, Å
        Jump length a (root-mean-square over jump vectors for a general site network).
    dimension : int
        Number of dimensions the ions move in (rank of the diffusion tensor).
    coordination : int
        z, jump directions per site (rounded mean where it varies).
    temperature_K, Ea_eV, attempt_frequency_THz : float or None
    mobile_species : str
    hop_times_ps : (n_hops,) float, ps
        Time of each hop, sorted.
    hop_frames : (n_hops,) int
        Index of the first saved frame at or after the hop.
    hop_ions : (n_hops,) int
        Atom index (in the trajectory) of the ion that hopped.
    hop_from_site, hop_to_site : (n_hops,) int
        Site indices (rows of ``site_positions_A``).
    site_positions_A : (n_sites, 3) float, Å
        Cartesian site positions in the cell (for the vacancy model: one replica).
    vibration_rms_A : float, Å
        Root-mean-square vibration about the site, per axis.
    model : str
        ``"hopping"`` or ``"vacancy_kmc"``.
    lattice : str
    initial_site_of_atom : (n_mobile,) int
        Site of each mobile atom at time 0 (atoms 0 .. n_mobile-1 are mobile).
    D_tensor_A2_per_ps : (3, 3) float or None, Å²/ps
        Exact diffusion tensor (hopping model), MSD_αβ(t) → 2 D_αβ t.
    replica_of_atom : (n_atoms,) int or None
        Vacancy model: the replica each atom belongs to (replicas do not interact).
    sites_per_replica, n_replicas : int or None
        Vacancy model: sites of one replica (atoms = sites − 1) and replica count.
    vacancy_exchange_rate_per_ps : float or None, 1/ps
        Vacancy model: rate of each vacancy–neighbour exchange.
    n_vacancy_jumps : int or None
        Vacancy model: vacancy jumps simulated per replica.
    """

    D_A2_per_ps: float | None
    D_cm2_per_s: float | None
    rate_per_direction_per_ps: float
    total_rate_per_ps: float
    jump_distance_A: float
    dimension: int
    coordination: int
    temperature_K: float | None
    Ea_eV: float | None
    attempt_frequency_THz: float | None
    mobile_species: str
    hop_times_ps: np.ndarray
    hop_frames: np.ndarray
    hop_ions: np.ndarray
    hop_from_site: np.ndarray
    hop_to_site: np.ndarray
    site_positions_A: np.ndarray
    vibration_rms_A: float
    model: str = "hopping"
    lattice: str = ""
    initial_site_of_atom: np.ndarray | None = None
    D_tensor_A2_per_ps: np.ndarray | None = None
    replica_of_atom: np.ndarray | None = None
    sites_per_replica: int | None = None
    n_replicas: int | None = None
    vacancy_exchange_rate_per_ps: float | None = None
    n_vacancy_jumps: int | None = None

    @property
    def n_hops(self):
        """Number of hops recorded."""
        return int(len(self.hop_times_ps))

    def to_dict(self, *, include_hops=True):
        """Plain JSON-ready dict (arrays become lists).

        Parameters
        ----------
        include_hops : bool
            Leave out the (possibly long) hop arrays when False.
        """
        out = {}
        for name in self.__dataclass_fields__:
            v = getattr(self, name)
            if name.startswith("hop_") and not include_hops:
                continue
            if isinstance(v, np.ndarray):
                v = v.tolist()
            elif isinstance(v, np.generic):
                v = v.item()
            out[name] = v
        out["n_hops"] = self.n_hops
        return out

    def __repr__(self):
        D = "None" if self.D_cm2_per_s is None else f"{self.D_cm2_per_s:.4g} cm²/s"
        T = "" if self.temperature_K is None else f", T={self.temperature_K:g} K"
        return (f"GroundTruth({self.model} on {self.lattice}, {self.mobile_species}: D={D}, "
                f"Γ_total={self.total_rate_per_ps:.4g}/ps, a={self.jump_distance_A:g} Å, "
                f"d={self.dimension}, z={self.coordination}{T}, {self.n_hops} hops, "
                f"{len(self.site_positions_A)} sites)")


@dataclass(frozen=True, eq=False)
class SyntheticRun:
    """A synthetic trajectory and the truth it was built to have."""

    trajectory: Trajectory
    truth: GroundTruth


@dataclass(frozen=True, eq=False, repr=False)
class CampaignTruth:
    """Hopping runs at several temperatures with the exact Arrhenius law.

    Attributes
    ----------
    runs : tuple of SyntheticRun, one per temperature (same order)
    temperatures_K : (n_T,) float, K
    Ea_eV : float, eV
    D0_cm2_per_s : float, cm²/s
        Prefactor: D(T) = D0 exp(−Ea / k_B T).
    D_cm2_per_s : (n_T,) float, cm²/s
        Exact D at each temperature.
    D300_cm2_per_s : float, cm²/s
        Exact D at 300 K.
    attempt_frequency_THz : float
    mobile_species : str
    """

    runs: tuple
    temperatures_K: np.ndarray
    Ea_eV: float
    D0_cm2_per_s: float
    D_cm2_per_s: np.ndarray
    D300_cm2_per_s: float
    attempt_frequency_THz: float = float("nan")
    mobile_species: str = "Li"

    def D_at(self, T_K):
        """Exact D at temperature(s) ``T_K`` (K), in cm²/s (scalar or array like ``T_K``)."""
        T = np.asarray(T_K, dtype=float)
        if np.any(~(T > 0)):
            raise UsageError(f"D_at: temperatures must be positive, got {T_K!r}")
        out = self.D0_cm2_per_s * np.exp(-self.Ea_eV / (K_B_EV_PER_K * T))
        return float(out) if out.ndim == 0 else out

    def to_dict(self, *, include_hops=False):
        """Plain JSON-ready dict; each run's truth via :meth:`GroundTruth.to_dict`."""
        return {
            "temperatures_K": self.temperatures_K.tolist(),
            "Ea_eV": self.Ea_eV,
            "D0_cm2_per_s": self.D0_cm2_per_s,
            "D_cm2_per_s": self.D_cm2_per_s.tolist(),
            "D300_cm2_per_s": self.D300_cm2_per_s,
            "attempt_frequency_THz": self.attempt_frequency_THz,
            "mobile_species": self.mobile_species,
            "runs": [r.truth.to_dict(include_hops=include_hops) for r in self.runs],
        }

    def __repr__(self):
        Ts = ", ".join(f"{t:g}" for t in self.temperatures_K)
        return (f"CampaignTruth({self.mobile_species}, T=[{Ts}] K, Ea={self.Ea_eV:g} eV, "
                f"D0={self.D0_cm2_per_s:.4g} cm²/s, D(300 K)={self.D300_cm2_per_s:.4g} cm²/s)")


# --------------------------------------------------------------------------- argument checks
def _check_number(name, value, *, positive=False, nonnegative=False, finite=True):
    try:
        v = float(value)
    except (TypeError, ValueError) as exc:
        raise UsageError(f"{name} must be a number, got {value!r}") from exc
    if finite and not math.isfinite(v):
        raise UsageError(f"{name} must be a finite number, got {value!r}")
    if positive and not v > 0:
        raise UsageError(f"{name} must be positive, got {value!r}")
    if nonnegative and not v >= 0:
        raise UsageError(f"{name} must be zero or positive, got {value!r}")
    return v


def _check_int(name, value, minimum):
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise UsageError(f"{name} must be a whole number, got {value!r}")
    if value < minimum:
        raise UsageError(f"{name} must be at least {minimum}, got {value}")
    return int(value)


def _check_element(name, symbol):
    from ase.data import atomic_numbers

    if not isinstance(symbol, str) or symbol not in atomic_numbers:
        raise UsageError(f"{name} must be an element symbol such as 'Li', got {symbol!r}")
    return symbol


def _seed_sequence(seed):
    """A SeedSequence from an int, a SeedSequence or None, and its record for provenance."""
    if isinstance(seed, np.random.SeedSequence):
        ss = seed
    elif seed is None:
        ss = np.random.SeedSequence()
    elif isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0:
        ss = np.random.SeedSequence(int(seed))
    else:
        raise UsageError(f"seed must be a non-negative integer, a numpy SeedSequence or None, "
                         f"got {seed!r}")
    if seed is not None and not isinstance(seed, np.random.SeedSequence):
        record = int(seed)
    else:
        ent = ss.entropy
        ent = [int(e) for e in ent] if isinstance(ent, (list, tuple)) else int(ent)
        if isinstance(ent, int) and ent >= 2**63:
            ent = str(ent)  # too wide for HDF5 attributes; kept exactly as text
        record = {"entropy": ent, "spawn_key": [int(k) for k in ss.spawn_key]}
    return ss, record


# --------------------------------------------------------------------------- site networks
@dataclass(frozen=True, eq=False)
class _Network:
    """A periodic network of sites: the repeat unit and its jumps.

    cell : (3, 3) repeat-unit cell, rows are lattice vectors, Å
    frac : (n, 3) fractional site coordinates in the unit
    src, dst : (n_edges,) site indices; shift : (n_edges, 3) int cell image of dst
    vec : (n_edges, 3) Cartesian jump vector, Å
    """

    cell: np.ndarray
    frac: np.ndarray
    src: np.ndarray
    dst: np.ndarray
    shift: np.ndarray
    vec: np.ndarray

    @property
    def n_sites(self):
        return len(self.frac)

    @property
    def z(self):
        return np.bincount(self.src, minlength=self.n_sites)


def _heights(cell):
    vol = abs(np.linalg.det(cell))
    return np.array([vol / np.linalg.norm(np.cross(cell[(j + 1) % 3], cell[(j + 2) % 3]))
                     for j in range(3)])


def _build_network(cell, frac, cutoff):
    """Every jump i -> j + image of length 0 < |d| <= cutoff."""
    n = len(frac)
    reach = np.ceil(cutoff / _heights(cell)).astype(int) + 1
    src, dst, shift, vec = [], [], [], []
    ii, jj = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    ii, jj = ii.ravel(), jj.ravel()
    dfrac = frac[jj] - frac[ii]
    tol = 1e-9 * max(cutoff, 1.0)
    for s in itertools.product(*(range(-r, r + 1) for r in reach)):
        d = (dfrac + np.array(s)) @ cell
        dist = np.linalg.norm(d, axis=1)
        keep = (dist > tol) & (dist <= cutoff)
        if np.any(keep):
            src.append(ii[keep])
            dst.append(jj[keep])
            shift.append(np.broadcast_to(np.array(s), (int(keep.sum()), 3)))
            vec.append(d[keep])
    if not src:
        raise UsageError(f"no two sites are within neighbour_cutoff_A = {cutoff:g} Å of each "
                         "other; ions could never jump — raise the cutoff")
    src = np.concatenate(src)
    order = np.lexsort((np.concatenate(dst), src))
    return _Network(np.array(cell, float), np.array(frac, float), src[order],
                    np.concatenate(dst)[order], np.concatenate(shift).astype(np.int64)[order],
                    np.concatenate(vec)[order])


def network_diffusion_tensor(cell, frac, cutoff_A, rate_per_direction_per_ps):
    """Exact diffusion tensor of non-interacting hoppers on a periodic site network.

    Every jump of length ≤ ``cutoff_A`` has the same rate Γ, so jumps are
    symmetric and every site is equally likely at equilibrium. Where the jumps
    out of a site do not cancel (local drift v_i = Γ Σ_e d_e ≠ 0, as on a
    non-Bravais network) successive jumps are correlated; the exact D follows
    from the corrector χ solving L χ = −v on the repeat unit (L the generator of
    the site-to-site jump process): X(t) + χ(site) is a martingale, so

        D = 1/(2 n_sites) Σ_i Σ_(e from i) Γ (d_e + χ_j − χ_i)(d_e + χ_j − χ_i)ᵀ

    (periodic homogenisation of a Markov jump process; common practice). On a
    Bravais lattice v = 0 and this is Γ Σ_e d_e d_eᵀ / 2, the Einstein relation.

    Parameters
    ----------
    cell : (3, 3) float, Å
        Repeat unit, rows are lattice vectors.
    frac : (n, 3) float
        Fractional site coordinates in the unit.
    cutoff_A : float, Å
        Longest jump.
    rate_per_direction_per_ps : float, 1/ps
        Γ of each jump.

    Returns
    -------
    (3, 3) float, Å²/ps
        D_αβ with MSD_αβ(t) → 2 D_αβ t.
    """
    net = _build_network(np.asarray(cell, float), np.asarray(frac, float).reshape(-1, 3),
                         float(cutoff_A))
    return _network_tensor(net, float(rate_per_direction_per_ps))


def _network_tensor(net, rate):
    n = net.n_sites
    drift = np.zeros((n, 3))
    np.add.at(drift, net.src, net.vec)
    chi = np.zeros((n, 3))
    if n > 1 and np.max(np.abs(drift)) > 1e-12 * np.max(np.abs(net.vec)):
        gen = np.zeros((n, n))
        np.add.at(gen, (net.src, net.dst), 1.0)
        gen[np.diag_indices(n)] -= net.z
        # the generator is symmetric and singular (constants); the system is consistent
        chi = np.linalg.lstsq(gen, -drift, rcond=None)[0]
    g = net.vec + chi[net.dst] - chi[net.src]
    return rate * (g.T @ g) / (2.0 * n)


def _lattice_network(lattice, a, c=None, sites=None, cell=None, site_coordinates="fractional",
                     cutoff=None):
    """The repeat unit of a hopping lattice and its jumps."""
    if lattice == "sc":
        return _build_network(np.eye(3) * a, np.full((1, 3), 0.5), 1.0001 * a)
    if lattice == "square":
        return _build_network(np.diag([a, a, c]), np.full((1, 3), 0.5), 1.0001 * a)
    # general site list
    if sites is None or cell is None:
        raise UsageError('lattice="sites" needs sites= (n, 3) and cell= (3, 3) or (3,) in Å')
    cell = np.asarray(cell, dtype=float)
    if cell.ndim == 0:
        cell = np.eye(3) * float(cell)
    elif cell.shape == (3,):
        cell = np.diag(cell)
    if cell.shape != (3, 3) or not np.all(np.isfinite(cell)) or abs(np.linalg.det(cell)) < 1e-9:
        raise UsageError(f"cell must be a non-degenerate (3, 3) matrix (rows are lattice vectors) "
                         f"or three lengths in Å, got {np.asarray(cell).tolist()!r}")
    sites = np.asarray(sites, dtype=float)
    if sites.ndim != 2 or sites.shape[1] != 3 or len(sites) < 1 or not np.all(np.isfinite(sites)):
        raise UsageError(f"sites must be an (n, 3) array of finite coordinates, got shape "
                         f"{sites.shape}")
    if site_coordinates == "fractional":
        frac = sites.copy()
    elif site_coordinates == "cartesian":
        frac = sites @ np.linalg.inv(cell)
    else:
        raise UsageError(f'site_coordinates must be "fractional" or "cartesian", '
                         f"got {site_coordinates!r}")
    frac = frac - np.floor(frac)
    frac[frac >= 1.0 - 1e-12] = 0.0
    # the shortest distance between distinct sites (any image)
    probe = _build_network(cell, frac, float(np.max(np.linalg.norm(cell, axis=1))) * 1.01)
    dmin = float(np.min(np.linalg.norm(probe.vec, axis=1)))
    if dmin < 1e-3:
        raise UsageError(f"two sites are only {dmin:.2g} Å apart (duplicate sites?)")
    if cutoff is None:
        cutoff = 1.05 * dmin
    cutoff = _check_number("neighbour_cutoff_A", cutoff, positive=True)
    net = _build_network(cell, frac, cutoff)
    lonely = np.flatnonzero(net.z == 0)
    if lonely.size:
        raise UsageError(f"site {int(lonely[0])} has no neighbour within neighbour_cutoff_A = "
                         f"{cutoff:g} Å; an ion there could never jump — raise the cutoff")
    return net


# --------------------------------------------------------------------------- hopping model
def _box_index(p, cimg, reps, n_unit):
    """Site index in the box of a unit site p in unit cell cimg (any integers)."""
    cm = np.mod(cimg, reps)
    return p + n_unit * ((cm[..., 0] * reps[1] + cm[..., 1]) * reps[2] + cm[..., 2])


def _hops_bravais(rng, net, n_ions, rate, T):
    """One site per unit: jump directions are independent of the path (fully vectorised)."""
    z = len(net.src)
    counts = rng.poisson(z * rate * T, size=n_ions)
    total = int(counts.sum())
    if total > _MAX_HOPS:
        raise UsageError(f"this run would make {total} hops (more than {_MAX_HOPS}); lower the "
                         "rate, the number of ions or frames")
    ions = np.repeat(np.arange(n_ions), counts)
    # given their number, the times of a Poisson process on [0, T] are uniform
    times = rng.uniform(0.0, T, size=total)
    order = np.lexsort((times, ions))
    times = times[order]
    edge = rng.integers(z, size=total)
    return ions, times, edge


def _hops_general(rng, net, n_ions, rate, T, start):
    """Site-dependent exit rates: advance all ions hop by hop (vectorised across ions)."""
    z = net.z
    first = np.concatenate([[0], np.cumsum(z)[:-1]])
    t = np.zeros(n_ions)
    p = start.copy()
    ions_l, times_l, edge_l = [], [], []
    total = 0
    active = np.arange(n_ions) if rate > 0 else np.zeros(0, np.int64)
    while active.size:
        zz = z[p[active]]
        t_new = t[active] + rng.exponential(1.0, size=active.size) / (zz * rate)
        ok = t_new <= T
        moving = active[ok]
        k = first[p[moving]] + np.minimum((rng.random(moving.size) * zz[ok]).astype(np.int64),
                                          zz[ok] - 1)
        ions_l.append(moving)
        times_l.append(t_new[ok])
        edge_l.append(k)
        p[moving] = net.dst[k]
        t[active] = t_new
        active = moving
        total += moving.size
        if total > _MAX_HOPS:
            raise UsageError(f"this run would make more than {_MAX_HOPS} hops; lower the rate, "
                             "the number of ions or frames")
    ions = np.concatenate(ions_l) if ions_l else np.zeros(0, np.int64)
    times = np.concatenate(times_l) if times_l else np.zeros(0)
    edge = np.concatenate(edge_l) if edge_l else np.zeros(0, np.int64)
    order = np.lexsort((times, ions))
    return ions[order], times[order], edge[order]


_MAX_CELLS_PER_SIDE = 64


def _choose_reps(lattice, net, n_ions, cells_per_side, reach_A):
    """Repeat units per box edge.

    Default: the smallest count (≥ 3 for "sc"/"square", ≥ 1 for "sites") with at
    least 2·n_ions sites whose box heights (in-plane only for "square") are at least
    ``reach_A`` / 0.35 — the largest frame-to-frame move then stays well below the
    0.4-of-a-height limit of minimum-image unwrapping (diffkit.unwrap), so a wrapped
    file of the run can be read back.
    """
    axes = [0, 1] if lattice == "square" else [0, 1, 2]
    heights = _heights(net.cell)[axes]
    if cells_per_side is not None:
        reps = np.array(np.broadcast_to(np.asarray(cells_per_side), (3,)))
        if not np.issubdtype(reps.dtype, np.integer) or np.any(reps < 1):
            raise UsageError(f"cells_per_side must be a positive whole number (or three), "
                             f"got {cells_per_side!r}")
        reps = reps.astype(np.int64)
        if lattice == "square":
            reps[2] = 1
        if np.min(reps[axes] * heights) * 0.35 < reach_A:
            warnings.warn(
                f"with cells_per_side={cells_per_side!r} an ion moves up to {reach_A:.3g} Å "
                f"between frames, more than 0.35 of the box height "
                f"({np.min(reps[axes] * heights):.3g} Å): a wrapped file of this run could not "
                "be unwrapped; use a larger box or a shorter frame interval",
                DiffkitWarning, stacklevel=3)
        return reps
    m = 3 if lattice != "sites" else 1
    while True:
        reps = np.array([m, m, m if lattice != "square" else 1])
        enough = net.n_sites * int(np.prod(reps)) >= 2 * n_ions
        roomy = np.min(m * heights) * 0.35 >= reach_A
        if (enough and roomy) or m >= _MAX_CELLS_PER_SIDE:
            if not roomy:
                warnings.warn(
                    f"ions move up to {reach_A:.3g} Å between frames; even a box of "
                    f"{m} repeat units per side is too small to unwrap a wrapped file of this "
                    "run — save frames more often", DiffkitWarning, stacklevel=3)
            return reps
        m += 1


# --------------------------------------------------------------------------- vibration
def _vibration_poles(period, damping):
    """AR(2) coefficients (φ1, φ2, r) of the correlated vibration, or None for white noise."""
    if period is None:
        if damping is not None:
            raise UsageError("vibration_damping needs vibration_period_frames (the damping "
                             "of an oscillation of that period)")
        return None
    P = _check_number("vibration_period_frames", period, positive=True)
    if not P > 2.0:
        raise UsageError(f"vibration_period_frames must exceed 2 frames (an oscillation "
                         f"sampled at least twice per period), got {period!r}")
    r = math.exp(-1.0 / P) if damping is None else _check_number("vibration_damping", damping)
    if not 0.0 < r < 1.0:
        raise UsageError(f"vibration_damping must lie strictly between 0 and 1 (envelope "
                         f"decay per frame), got {damping!r}")
    w = 2.0 * math.pi / P
    return 2.0 * r * math.cos(w), -r * r, r


def ar2_autocorrelation(phi1, phi2, max_lag):
    """Autocorrelation ρ(0 … max_lag) of the stationary AR(2) process.

    x_t = φ1 x_{t−1} + φ2 x_{t−2} + ε_t has ρ(0) = 1, ρ(1) = φ1 / (1 − φ2) and
    ρ(k) = φ1 ρ(k−1) + φ2 ρ(k−2) (the Yule–Walker equations; Box & Jenkins,
    *Time Series Analysis*, ch. 3, AR(2) process).

    Parameters
    ----------
    phi1, phi2 : float
        Coefficients of a stationary process (poles inside the unit circle).
    max_lag : int
        Largest lag, frames.

    Returns
    -------
    (max_lag + 1,) float
    """
    rho = np.empty(int(max_lag) + 1)
    rho[0] = 1.0
    if max_lag >= 1:
        rho[1] = phi1 / (1.0 - phi2)
    for k in range(2, int(max_lag) + 1):
        rho[k] = phi1 * rho[k - 1] + phi2 * rho[k - 2]
    return rho


def _ar2_noise(rng, shape, sigma, phi1, phi2, r):
    """Stationary AR(2) noise along axis 0 with rms ``sigma``: (n_frames, ...) float.

    The innovation variance giving a stationary variance γ0 = σ² is
    σ_ε² = σ² (1 + φ2) ((1 − φ2)² − φ1²) / (1 − φ2) (Box & Jenkins, ch. 3);
    the first two frames are drawn from the stationary joint distribution
    (variance σ², lag-one correlation ρ1), so the process is stationary from
    frame 0 on.
    """
    from scipy.signal import lfilter

    rho1 = phi1 / (1.0 - phi2)
    s_eps = sigma * math.sqrt((1.0 + phi2) * ((1.0 - phi2) ** 2 - phi1 ** 2) / (1.0 - phi2))
    out = np.empty(shape)
    z = rng.standard_normal(size=(2,) + tuple(shape[1:]))
    out[0] = sigma * z[0]
    if shape[0] > 1:
        out[1] = sigma * (rho1 * z[0] + math.sqrt(1.0 - rho1 * rho1) * z[1])
    if shape[0] > 2:
        eps = rng.standard_normal(size=(shape[0] - 2,) + tuple(shape[1:])) * s_eps
        # direct form II transposed state that continues from x1, x0
        zi = np.stack([phi1 * out[1] + phi2 * out[0], phi2 * out[1]])
        out[2:], _ = lfilter([1.0], [1.0, -phi1, -phi2], eps, axis=0, zi=zi)
    return out


def hopping_run(*, n_ions=100, n_frames=10_000, frame_interval_ps=0.1, temperature_K=600.0,
                Ea_eV=0.2, attempt_frequency_THz=10.0, jump_distance_A=2.0, lattice="sc",
                sites=None, cell=None, site_coordinates="fractional", neighbour_cutoff_A=None,
                cells_per_side=None, c_A=None, vibration_rms_A=0.1, framework=None,
                mobile_species="Li", seed=0, vibration_period_frames=None,
                vibration_damping=None):
    """Non-interacting ions hopping between lattice sites, with thermal vibration.

    Each ion jumps to each neighbouring site with rate Γ = ν exp(−Ea / k_B T)
    (ν in THz = 1/ps), so residence times are exponential with mean 1/(z Γ)
    (a continuous-time Poisson process: stays of a few frames occur, and
    several hops between two saved frames are possible at high rates). Ions do
    not interact; several may share a site. Saved positions are the ion's
    unwrapped site position plus Gaussian noise of rms ``vibration_rms_A`` per
    axis: drawn independently per frame, or — with ``vibration_period_frames`` —
    a damped oscillation driven by noise, correlated from frame to frame as the
    vibration of an MD run saved every few femtoseconds.

    Parameters
    ----------
    n_ions : int
        Number of mobile ions (atoms 0 .. n_ions−1 of the trajectory).
    n_frames : int
        Saved frames (≥ 2), at times 0, Δt, 2Δt, ... ps.
    frame_interval_ps : float, ps
        Δt between saved frames.
    temperature_K, Ea_eV, attempt_frequency_THz : float
        T (K), activation energy (eV, ≥ 0) and attempt frequency ν (THz).
    jump_distance_A : float, Å
        Lattice constant a of "sc" and "square" (ignored for "sites": jumps
        follow the site network).
    lattice : {"sc", "square", "sites"}
        Simple cubic (z = 6, d = 3); square (z = 4 in the xy plane, d = 2; the
        sites keep z = c/2, vibration is in all three axes); or a general
        periodic site list given by ``sites`` and ``cell``.
    sites : (n, 3) float, optional
        Sites of one repeat unit (lattice="sites"), in ``site_coordinates``.
    cell : (3, 3) or (3,) float, Å, optional
        The repeat unit of ``sites`` (rows are lattice vectors, or three lengths).
    site_coordinates : {"fractional", "cartesian"}
    neighbour_cutoff_A : float, Å, optional
        lattice="sites": jumps go to every site within this distance (default
        1.05 × the shortest site–site distance, i.e. nearest neighbours).
    cells_per_side : int or (3,) int, optional
        Repeat units per box edge. Default: the smallest count (≥ 3 for "sc" and
        "square") with at least 2·n_ions sites in which the largest move of any
        ion between two frames (jumps plus a vibration allowance) is below 0.35
        of the box height, so that a wrapped file of the run can be unwrapped.
        A smaller box given here gets a DiffkitWarning.
    c_A : float, Å, optional
        Box height along z for lattice="square" (default: the in-plane edge).
    vibration_rms_A : float, Å
        rms vibration per axis (≥ 0).
    framework : dict of str to int, optional
        Immobile atoms, e.g. ``{"P": 16, "S": 64}``, at fixed random positions
        in the box, vibrating with the same rms; placed after the mobile ions.
    mobile_species : str
        Element symbol of the ions.
    seed : int, numpy.random.SeedSequence or None
        Same seed, same run.
    vibration_period_frames : float, frames, optional
        None (default): vibration independent from frame to frame (the same
        numbers as before this option existed, for the same seed). A number
        P > 2: every coordinate of every atom vibrates as a stationary
        second-order autoregressive process (a damped harmonic oscillator
        driven by white noise, sampled once per frame) with poles at
        r·exp(±2πi/P), scaled so that its stationary rms per axis is exactly
        ``vibration_rms_A``; its autocorrelation is ρ(k) ≈ r^k cos(2πk/P)
        (exactly: :func:`ar2_autocorrelation`).
    vibration_damping : float, optional
        r in (0, 1), the factor by which the oscillation's envelope decays per
        frame. Default exp(−1/P): the autocorrelation envelope falls to 1/e
        over one period. Only with ``vibration_period_frames``.

    Returns
    -------
    SyntheticRun
        ``trajectory`` (constant box, times from 0, ``temperature_K`` set,
        masses from ASE, provenance recording every parameter and the seed) and
        ``truth`` (exact D; every hop with its time, frame, ion, from- and
        to-site; site positions).

    Notes
    -----
    D is exact: Γ_total a² / (2d) on the Bravais lattices (Einstein relation;
    Mehrer, Diffusion in Solids, 2007, ch. 4); for a site list it comes from
    :func:`network_diffusion_tensor` (d = rank of the tensor, D = trace / d).
    """
    n_ions = _check_int("n_ions", n_ions, 1)
    n_frames = _check_int("n_frames", n_frames, 2)
    dt = _check_number("frame_interval_ps", frame_interval_ps, positive=True)
    T_K = _check_number("temperature_K", temperature_K, positive=True)
    Ea = _check_number("Ea_eV", Ea_eV, nonnegative=True)
    nu = _check_number("attempt_frequency_THz", attempt_frequency_THz, positive=True)
    a = _check_number("jump_distance_A", jump_distance_A, positive=True)
    sigma = _check_number("vibration_rms_A", vibration_rms_A, nonnegative=True)
    ar2 = _vibration_poles(vibration_period_frames, vibration_damping)
    _check_element("mobile_species", mobile_species)
    if lattice not in HOPPING_LATTICES:
        raise UsageError(f"unknown lattice {lattice!r} for hopping_run; "
                         f"choose one of {', '.join(HOPPING_LATTICES)}")
    framework = dict(framework or {})
    for sym, count in framework.items():
        _check_element("framework species", sym)
        _check_int(f"framework[{sym!r}]", count, 0)
        if sym == mobile_species:
            raise UsageError(f"framework species {sym!r} is also the mobile species")
    ss, seed_record = _seed_sequence(seed)
    rng = np.random.default_rng(ss)

    rate = nu * math.exp(-Ea / (K_B_EV_PER_K * T_K))
    T_run = (n_frames - 1) * dt

    # the repeat unit and its jumps (the box is chosen once the hops are known)
    if lattice == "square":
        net = _lattice_network("square", a, c=4.0 * a)  # c is set with the box below
    else:
        net = _lattice_network(lattice, a, sites=sites, cell=cell,
                               site_coordinates=site_coordinates, cutoff=neighbour_cutoff_A)
    n_unit = net.n_sites

    # start sites (unit site, and where in the box as a fraction), then the hops
    p0 = rng.integers(n_unit, size=n_ions)
    u0 = rng.random((n_ions, 3))
    if n_unit == 1:
        ions, times, edge = _hops_bravais(rng, net, n_ions, rate, T_run)
    else:
        ions, times, edge = _hops_general(rng, net, n_ions, rate, T_run, p0)

    # site displacements accumulated to the frames (first saved frame at/after each hop)
    frames = np.minimum(np.ceil(times / dt - 1e-12).astype(np.int64), n_frames - 1)
    frames = np.maximum(frames, 1)
    flat = frames * n_ions + ions
    disp = np.empty((n_frames, n_ions, 3))
    for ax in range(3):
        disp[:, :, ax] = np.bincount(flat, weights=net.vec[edge, ax],
                                     minlength=n_frames * n_ions).reshape(n_frames, n_ions)
    step_max = float(np.sqrt(np.max(np.sum(disp * disp, axis=2)))) if len(edge) else 0.0
    # a frame-to-frame vibration difference has rms sqrt(2)·σ per axis; 8 of those bound it
    reach = step_max + 8.0 * math.sqrt(2.0) * sigma
    reps = _choose_reps(lattice, net, n_ions, cells_per_side, reach)
    if lattice == "square":
        c = reps[0] * a if c_A is None else _check_number("c_A", c_A, positive=True)
        if c <= 1.0001 * a or 0.35 * c < 8.0 * math.sqrt(2.0) * sigma:
            raise UsageError(f"c_A = {c:g} Å is too small: it must exceed the jump distance "
                             f"{a:g} Å and leave room for the vibration")
        net = _Network(np.diag([a, a, c]), net.frac, net.src, net.dst, net.shift, net.vec)
    box = net.cell * reps[:, None]
    grid = np.array(list(itertools.product(*(range(int(r)) for r in reps))), dtype=np.int64)
    site_pos = ((net.frac[None, :, :] + grid[:, None, :]) @ net.cell).reshape(-1, 3)
    # site index = p + n_unit * flat(cell) — the order of site_pos above
    c0 = np.minimum(np.floor(u0 * reps).astype(np.int64), reps - 1)
    start = _box_index(p0, c0, reps, n_unit)

    # unit site and unit-cell image before/after each hop (cumulative per ion)
    shifts = net.shift[edge]
    cum = np.cumsum(shifts, axis=0) if len(edge) else np.zeros((0, 3), np.int64)
    first_of_ion = np.searchsorted(ions, np.arange(n_ions))
    before_first = np.zeros((n_ions, 3), np.int64)
    has = np.bincount(ions, minlength=n_ions) > 0
    before_first[has] = cum[first_of_ion[has]] - shifts[first_of_ion[has]]
    c_after = c0[ions] + cum - before_first[ions]
    c_before = c_after - shifts
    hop_from = _box_index(net.src[edge], c_before, reps, n_unit)
    hop_to = _box_index(net.dst[edge], c_after, reps, n_unit)

    # positions: start site + cumulative jumps + vibration
    np.cumsum(disp, axis=0, out=disp)
    disp += site_pos[start][None, :, :]

    species = [mobile_species] * n_ions
    fw_pos = np.zeros((0, 3))
    for sym, count in framework.items():
        species += [sym] * int(count)
    n_fw = len(species) - n_ions
    if n_fw:
        fw_pos = rng.random((n_fw, 3)) @ box
    positions = np.empty((n_frames, n_ions + n_fw, 3))
    positions[:, :n_ions] = disp
    positions[:, n_ions:] = fw_pos[None]
    if sigma > 0 and ar2 is None:
        positions += rng.normal(0.0, sigma, size=positions.shape)
    elif sigma > 0:
        positions += _ar2_noise(rng, positions.shape, sigma, *ar2)

    # exact D (the tensor per unit rate fixes the dimensionality even where Γ underflows)
    z_mean = len(net.src) / n_unit
    unit_tensor = _network_tensor(net, 1.0)
    D_tensor = rate * unit_tensor
    if lattice in ("sc", "square"):
        dim = 3 if lattice == "sc" else 2
        D = z_mean * rate * a * a / (2.0 * dim)  # Einstein relation, Mehrer ch. 4
        a_jump = a
    else:
        ev = np.linalg.eigvalsh(unit_tensor)
        dim = int(np.sum(ev > 1e-9 * ev.max()))
        D = rate * float(np.trace(unit_tensor)) / dim
        a_jump = float(np.sqrt(np.mean(np.sum(net.vec ** 2, axis=1))))

    order = np.argsort(times, kind="stable")
    truth = GroundTruth(
        D_A2_per_ps=float(D), D_cm2_per_s=float(a2ps_to_cm2s(D)),
        rate_per_direction_per_ps=float(rate), total_rate_per_ps=float(z_mean * rate),
        jump_distance_A=float(a_jump), dimension=int(dim), coordination=int(round(z_mean)),
        temperature_K=T_K, Ea_eV=Ea, attempt_frequency_THz=nu, mobile_species=mobile_species,
        hop_times_ps=times[order], hop_frames=frames[order], hop_ions=ions[order],
        hop_from_site=hop_from[order], hop_to_site=hop_to[order],
        site_positions_A=site_pos, vibration_rms_A=sigma, model="hopping", lattice=lattice,
        initial_site_of_atom=start, D_tensor_A2_per_ps=D_tensor)
    params = {"n_ions": n_ions, "n_frames": n_frames, "frame_interval_ps": dt,
              "temperature_K": T_K, "Ea_eV": Ea, "attempt_frequency_THz": nu,
              "jump_distance_A": a, "lattice": lattice, "cells_per_side": reps.tolist(),
              "vibration_rms_A": sigma, "framework": {k: int(v) for k, v in framework.items()},
              "mobile_species": mobile_species}
    if ar2 is not None:
        params.update(vibration_period_frames=float(vibration_period_frames),
                      vibration_damping=float(ar2[2]))
    if lattice == "sites":
        params.update(sites=net.frac.tolist(), cell=net.cell.tolist(),
                      neighbour_cutoff_A=float(np.max(np.linalg.norm(net.vec, axis=1))))
    if lattice == "square":
        params["c_A"] = float(net.cell[2, 2])
    traj = Trajectory(species, np.arange(n_frames) * dt, box, positions, temperature_K=T_K,
                      frame_interval_ps=dt,
                      provenance={"generator": "diffkit.synth.hopping_run", "parameters": params,
                                  "seed": seed_record})
    return SyntheticRun(traj, truth)


# --------------------------------------------------------------------------- vacancy KMC
def _vacancy_lattice(lattice, a, m, c=None):
    """Integer grid of a lattice: basis (3, 3) Å per grid unit, period (3,), site mask, jumps."""
    if lattice == "sc":
        basis, period = np.eye(3) * a, np.array([m, m, m])
        jumps = np.array([v for v in itertools.product((-1, 0, 1), repeat=3)
                          if sum(map(abs, v)) == 1])
        rule = lambda g: np.ones(len(g), bool)  # noqa: E731
    elif lattice == "bcc":
        u = a / math.sqrt(3.0)  # half the cubic edge 2a/√3
        basis, period = np.eye(3) * u, np.array([2 * m] * 3)
        jumps = np.array(list(itertools.product((-1, 1), repeat=3)))
        rule = lambda g: (g[:, 0] % 2 == g[:, 1] % 2) & (g[:, 1] % 2 == g[:, 2] % 2)  # noqa: E731
    elif lattice == "fcc":
        u = a / math.sqrt(2.0)  # half the cubic edge √2 a
        basis, period = np.eye(3) * u, np.array([2 * m] * 3)
        jumps = np.array([v for v in itertools.product((-1, 0, 1), repeat=3)
                          if sum(map(abs, v)) == 2])
        rule = lambda g: g.sum(axis=1) % 2 == 0  # noqa: E731
    elif lattice == "square":
        basis, period = np.diag([a, a, c]), np.array([m, m, 1])
        jumps = np.array([(1, 0, 0), (-1, 0, 0), (0, 1, 0), (0, -1, 0)])
        rule = lambda g: np.ones(len(g), bool)  # noqa: E731
    else:  # triangular
        basis = np.array([[a, 0.0, 0.0], [0.5 * a, 0.5 * math.sqrt(3.0) * a, 0.0], [0, 0, c]])
        period = np.array([m, m, 1])
        jumps = np.array([(1, 0, 0), (-1, 0, 0), (0, 1, 0), (0, -1, 0), (1, -1, 0), (-1, 1, 0)])
        rule = lambda g: np.ones(len(g), bool)  # noqa: E731
    grid = np.array(list(itertools.product(*(range(int(p)) for p in period))), dtype=np.int64)
    grid = grid[rule(grid)]
    return basis, period, grid, jumps.astype(np.int64)


_KMC_DEFAULT_SIDE = {"sc": 10, "bcc": 8, "fcc": 6, "square": 32, "triangular": 32}


def vacancy_kmc_run(*, lattice="sc", cells_per_side=None, n_replicas=20, n_vacancy_jumps=None,
                    save_every=None, jump_rate_per_ps=1.0, jump_distance_A=2.5, species="Li",
                    record_hops=True, seed=0):
    """Single-vacancy kinetic Monte Carlo: every atom a tracer, many replicas.

    Each replica is a periodic box of N lattice sites holding N − 1 atoms and
    one vacancy. At each step the vacancy exchanges with one of its z
    neighbours, chosen at random; the time advances by the mean waiting time
    τ = 1/(z·w) (deterministic: the tracer statistics per vacancy jump do not
    depend on the waiting-time distribution, and a constant τ makes frame
    times exact). Replicas are independent and are stacked as separate atoms
    of one trajectory (``truth.replica_of_atom``); positions are unwrapped and
    are saved every ``save_every`` vacancy jumps.

    The truth is the **uncorrelated** tracer D = Γ_t a² / (2d) with
    Γ_t = z·w / (N − 1), the mean jump rate of one tracer (each vacancy jump
    moves exactly one of the N − 1 atoms), so that D_measured / D_truth is the
    tracer correlation factor f (Compaan & Haven 1956; in the dilute limit
    Γ_t → z·w·c_v with c_v = 1/N). Do not subtract the centre of mass when
    measuring: the atoms' displacements sum to minus the vacancy's.

    Parameters
    ----------
    lattice : {"sc", "bcc", "fcc", "square", "triangular"}
    cells_per_side : int, optional
        Conventional cubic cells per edge (sc, bcc, fcc) or primitive cells per
        edge (square, triangular). Default about 1,000 sites: 10 (sc, 1000),
        8 (bcc, 1024), 6 (fcc, 864), 32 (square and triangular, 1024).
    n_replicas : int
        Independent boxes, simulated together.
    n_vacancy_jumps : int, optional
        Vacancy jumps per replica; a multiple of ``save_every``. Default
        200 × save_every (about 50 jumps per tracer).
    save_every : int, optional
        Vacancy jumps between saved frames (default N // 4: a tracer jumps a
        quarter of a time per frame on average).
    jump_rate_per_ps : float, 1/ps
        w, the rate of each vacancy–neighbour exchange.
    jump_distance_A : float, Å
        Nearest-neighbour distance a.
    species : str
        Element symbol of the atoms.
    record_hops : bool
        Keep every atom jump in the truth (R × n_vacancy_jumps entries);
        False leaves the hop arrays empty.
    seed : int, numpy.random.SeedSequence or None

    Returns
    -------
    SyntheticRun

    Notes
    -----
    The vacancy's walk does not depend on the atoms, so it is drawn for all
    steps and replicas at once; the atom moved at step s is the one that
    entered the vacancy's target site when the vacancy last left it, a chain of
    earlier steps resolved by pointer doubling (O(n log n), no Python loop over
    steps). Precision of f is set by the number of tracers: with the default
    ~1,000 sites, 200 frames and 20 replicas the standard error of f is about
    0.2%. The periodic box biases f: in development runs (sc) f came out about
    0.5% high at 343 sites, 0.2–0.4% at 1,000 and under 0.1% at 2,744. A
    tracer next to the vacancy can move several jump lengths between frames;
    :func:`write_run` refuses XDATCAR (wrapped coordinates) where that is too
    far to unwrap — use a smaller ``save_every`` or another format.
    """
    if lattice not in VACANCY_LATTICES:
        raise UsageError(f"unknown lattice {lattice!r} for vacancy_kmc_run; "
                         f"choose one of {', '.join(VACANCY_LATTICES)}")
    m = _KMC_DEFAULT_SIDE[lattice] if cells_per_side is None else cells_per_side
    m = _check_int("cells_per_side", m, 2 if lattice in ("bcc", "fcc") else 3)
    R = _check_int("n_replicas", n_replicas, 1)
    w = _check_number("jump_rate_per_ps", jump_rate_per_ps, positive=True)
    a = _check_number("jump_distance_A", jump_distance_A, positive=True)
    _check_element("species", species)
    c = m * a  # box height of the 2D lattices
    basis, period, grid, jumps = _vacancy_lattice(lattice, a, m, c)
    N = len(grid)
    z = len(jumps)
    dim = 2 if lattice in ("square", "triangular") else 3
    every = max(1, N // 4) if save_every is None else _check_int("save_every", save_every, 1)
    n_steps = 200 * every if n_vacancy_jumps is None else _check_int("n_vacancy_jumps",
                                                                      n_vacancy_jumps, 1)
    if n_steps % every:
        raise UsageError(f"n_vacancy_jumps ({n_steps}) must be a multiple of save_every ({every})")
    if R * n_steps > 200_000_000:
        raise UsageError(f"n_replicas × n_vacancy_jumps = {R * n_steps} is too large "
                         "(limit 2e8); use fewer replicas or jumps")
    ss, seed_record = _seed_sequence(seed)
    rng = np.random.default_rng(ss)

    # dense site numbering through a lookup over the full grid
    def key(g):
        g = np.mod(g, period)
        return (g[..., 0] * period[1] + g[..., 1]) * period[2] + g[..., 2]

    dense = np.full(int(np.prod(period)), -1, dtype=np.int64)
    dense[key(grid)] = np.arange(N)
    origin = np.where(period > 1, 0.5, 0.0) @ basis  # keep sites off the cell faces
    if dim == 2:
        origin = origin + np.array([0.0, 0.0, 0.5 * c])
    site_pos = grid @ basis + origin

    # the vacancy's walk: start site + cumulative jumps (all replicas at once)
    v0 = rng.integers(N, size=R)
    dirs = rng.integers(z, size=(R, n_steps)).astype(np.int8 if z < 127 else np.int64)
    walk = np.empty((R, n_steps + 1, 3), dtype=np.int64)
    walk[:, 0] = grid[v0]
    np.cumsum(jumps[dirs], axis=1, out=walk[:, 1:])
    walk[:, 1:] += grid[v0][:, None, :]
    vsite = dense[key(walk)]  # (R, n_steps + 1) dense site of the vacancy before each step
    del walk

    # Step s: the atom on vsite[s+1] moves to vsite[s]. That atom entered vsite[s+1] at the
    # last earlier step s' that the vacancy left vsite[s+1] (vsite[s'] == vsite[s+1]); then it
    # is the mover of step s'. With no earlier visit it is the initial occupant. Resolve the
    # chains step -> s' by pointer doubling.
    n1 = n_steps + 1
    gkey = (np.arange(R, dtype=np.int64)[:, None] * N + vsite).ravel()
    order = np.lexsort((np.tile(np.arange(n1), R), gkey))  # by (replica, site, time)
    prev_occ = np.full(R * n1, -1, dtype=np.int64)
    same = gkey[order[1:]] == gkey[order[:-1]]
    prev_occ[order[1:][same]] = order[:-1][same]
    del order, same, gkey
    target = (np.arange(R)[:, None] * n1 + np.arange(1, n1)[None, :]).ravel()  # occurrence s+1
    prev = prev_occ[target]
    del prev_occ, target
    # flat occurrence r*n1 + s'  ->  flat step r*n_steps + s'
    step_id = np.arange(R * n_steps, dtype=np.int64)
    parent = np.where(prev >= 0, prev - prev // n1, step_id)
    del prev
    while True:
        nxt = parent[parent]
        if np.array_equal(nxt, parent):
            break
        parent = nxt
    rep = step_id // n_steps
    root_target = vsite[rep, parent - rep * n_steps + 1]  # the site the root step's atom left
    v0r = v0[rep]
    local = root_target - (root_target > v0r)  # atoms numbered by site, skipping the vacancy
    mover = rep * (N - 1) + local
    del parent, root_target, v0r, local

    # atom displacements: minus the vacancy's jump, accumulated to the saved frames
    n_frames = n_steps // every + 1
    n_atoms = R * (N - 1)
    frame_of_step = (np.arange(n_steps) // every + 1)  # step s completes at (s+1)τ
    frame_flat = np.broadcast_to(frame_of_step, (R, n_steps)).ravel()
    jvec = -(jumps @ basis)  # (z, 3) Cartesian displacement of the mover
    dflat = dirs.ravel()
    idx = frame_flat * n_atoms + mover
    positions = np.empty((n_frames, n_atoms, 3))
    for ax in range(3):
        positions[:, :, ax] = np.bincount(idx, weights=jvec[dflat, ax],
                                          minlength=n_frames * n_atoms).reshape(n_frames, n_atoms)
    np.cumsum(positions, axis=0, out=positions)
    atom_site = np.concatenate([np.delete(np.arange(N), v0[r]) for r in range(R)])
    positions += site_pos[atom_site][None]
    del idx

    tau = 1.0 / (z * w)
    times = np.arange(n_frames) * every * tau
    cell = period[:, None] * basis
    if record_hops:
        s_idx = np.arange(R * n_steps) % n_steps
        hop_t = (s_idx + 1) * tau
        hop_frames = frame_flat.copy()
        hop_from = vsite[:, 1:].ravel()
        hop_to = vsite[:, :-1].ravel()
        order = np.argsort(s_idx, kind="stable")  # by time, replicas interleaved
        hops = (hop_t[order], hop_frames[order], mover[order], hop_from[order], hop_to[order])
    else:
        hops = (np.zeros(0), np.zeros(0, np.int64), np.zeros(0, np.int64),
                np.zeros(0, np.int64), np.zeros(0, np.int64))

    rate_t = z * w / (N - 1)  # mean jump rate of one tracer
    D = rate_t * a * a / (2.0 * dim)
    truth = GroundTruth(
        D_A2_per_ps=float(D), D_cm2_per_s=float(a2ps_to_cm2s(D)),
        rate_per_direction_per_ps=float(w / (N - 1)), total_rate_per_ps=float(rate_t),
        jump_distance_A=a, dimension=dim, coordination=z, temperature_K=None, Ea_eV=None,
        attempt_frequency_THz=None, mobile_species=species,
        hop_times_ps=hops[0], hop_frames=hops[1], hop_ions=hops[2], hop_from_site=hops[3],
        hop_to_site=hops[4], site_positions_A=site_pos, vibration_rms_A=0.0,
        model="vacancy_kmc", lattice=lattice, initial_site_of_atom=atom_site,
        replica_of_atom=np.repeat(np.arange(R), N - 1), sites_per_replica=N, n_replicas=R,
        vacancy_exchange_rate_per_ps=w, n_vacancy_jumps=n_steps)
    params = {"lattice": lattice, "cells_per_side": m, "n_replicas": R,
              "n_vacancy_jumps": n_steps, "save_every": every, "jump_rate_per_ps": w,
              "jump_distance_A": a, "species": species, "sites_per_replica": N,
              "waiting_time": "deterministic mean 1/(z w)"}
    traj = Trajectory([species] * n_atoms, times, cell, positions, frame_interval_ps=every * tau,
                      provenance={"generator": "diffkit.synth.vacancy_kmc_run", "parameters": params,
                                  "seed": seed_record,
                                  "replica_of_atom": "truth.replica_of_atom (atoms of replica r "
                                  "are r*(N-1) .. (r+1)*(N-1)-1)"})
    return SyntheticRun(traj, truth)


# --------------------------------------------------------------------------- campaigns
def arrhenius_campaign(*, temperatures_K=(500, 600, 750, 1000), Ea_eV=0.2,
                       attempt_frequency_THz=10.0, n_ions=100, n_frames=1000,
                       frame_interval_ps=0.1, jump_distance_A=2.0, vibration_rms_A_at_300K=0.1,
                       framework=None, mobile_species="Li", lattice="sc", seed=0,
                       vibration_period_frames=None, vibration_damping=None):
    """One :func:`hopping_run` per temperature, with the exact Arrhenius law.

    Vibration rms scales as sqrt(T / 300 K) (classical harmonic oscillator).
    Seeds per temperature are spawned from ``seed`` with
    ``numpy.random.SeedSequence.spawn``. All runs share one box (and so one
    volume): the default box of the hottest run, which is large enough for
    every run to be written to a wrapped file and read back.

    Parameters
    ----------
    temperatures_K : sequence of float, K
    lattice : {"sc", "square"}
    Other parameters as in :func:`hopping_run`.

    Returns
    -------
    CampaignTruth
        D(T) = D0 exp(−Ea / k_B T) with D0 = z ν a² / (2d).
    """
    try:
        temps = np.asarray(temperatures_K, dtype=float).reshape(-1)
    except (TypeError, ValueError) as exc:
        raise UsageError(f"temperatures_K must be a sequence of numbers, got "
                         f"{temperatures_K!r}") from exc
    if temps.size < 1 or np.any(~(temps > 0)) or np.any(~np.isfinite(temps)):
        raise UsageError(f"temperatures_K must be one or more positive temperatures, "
                         f"got {temperatures_K!r}")
    if lattice not in ("sc", "square"):
        raise UsageError(f"arrhenius_campaign needs lattice 'sc' or 'square', got {lattice!r}")
    sig300 = _check_number("vibration_rms_A_at_300K", vibration_rms_A_at_300K, nonnegative=True)
    ss, _ = _seed_sequence(seed)
    children = ss.spawn(len(temps))

    def one(i, cells_per_side):
        T = float(temps[i])
        return hopping_run(n_ions=n_ions, n_frames=n_frames, frame_interval_ps=frame_interval_ps,
                           temperature_K=T, Ea_eV=Ea_eV,
                           attempt_frequency_THz=attempt_frequency_THz,
                           jump_distance_A=jump_distance_A, lattice=lattice,
                           cells_per_side=cells_per_side,
                           vibration_rms_A=sig300 * math.sqrt(T / 300.0), framework=framework,
                           mobile_species=mobile_species, seed=children[i],
                           vibration_period_frames=vibration_period_frames,
                           vibration_damping=vibration_damping)

    # one box for all temperatures: the one the hottest (fastest) run needs to be unwrappable
    hottest = int(np.argmax(temps))
    runs = [None] * len(temps)
    runs[hottest] = one(hottest, None)
    reps = runs[hottest].trajectory.provenance["parameters"]["cells_per_side"]
    for i in range(len(temps)):
        if runs[i] is None:
            runs[i] = one(i, np.asarray(reps))
    runs = tuple(runs)
    t0 = runs[0].truth
    z, dim, a = t0.coordination, t0.dimension, t0.jump_distance_A
    D0 = float(a2ps_to_cm2s(z * t0.attempt_frequency_THz * a * a / (2.0 * dim)))
    Ea = t0.Ea_eV
    D = np.array([r.truth.D_cm2_per_s for r in runs])
    D300 = D0 * math.exp(-Ea / (K_B_EV_PER_K * 300.0))
    return CampaignTruth(runs, temps, Ea, D0, D, D300, t0.attempt_frequency_THz, mobile_species)


# --------------------------------------------------------------------------- writers
_WRITE_FORMATS = {"xdatcar": ".xdatcar", "lammpsdump": ".lammpstrj", "extxyz": ".extxyz"}


def _quantity(value, unit):
    return f"{float(value):.12g}{unit}"


def write_run(run, folder, *, fmt="xdatcar", name=None, compress=True, steps_per_frame=10):
    """Write a synthetic run's trajectory to a file, with a run card beside it.

    Parameters
    ----------
    run : SyntheticRun
    folder : str or path-like
        Created if missing.
    fmt : {"xdatcar", "lammpsdump", "extxyz"}
    name : str, optional
        File name without extension; default ``<species>_<T>K_<lattice>``.
    compress : bool
        gzip the trajectory file (``.gz`` appended).
    steps_per_frame : int
        LAMMPS dump only: MD steps between saved frames; the run card then gives
        ``md_timestep`` = frame interval / steps_per_frame.

    Returns
    -------
    str
        Path of the trajectory file; its run card is ``<path>.runcard.toml``
        (frame interval, temperature, mobile species; for LAMMPS also the MD
        time step, the unit style and the type map).

    Raises
    ------
    UsageError
        For XDATCAR (wrapped coordinates only) when an atom moves more between
        two frames than the readers can unwrap (see :mod:`diffkit.unwrap`).
        LAMMPS dumps and extended XYZ keep the unwrapped coordinates.
    """
    from .io import write as writers
    from .io.runcard import write_runcard

    if fmt not in _WRITE_FORMATS:
        raise UsageError(f"unknown format {fmt!r} for write_run; choose one of "
                         f"{', '.join(_WRITE_FORMATS)}")
    if not isinstance(run, SyntheticRun):
        raise UsageError(f"write_run needs a SyntheticRun, got {type(run).__name__}")
    steps_per_frame = _check_int("steps_per_frame", steps_per_frame, 1)
    traj, truth = run.trajectory, run.truth
    if name is None:
        T = "" if traj.temperature_K is None else f"_{traj.temperature_K:g}K"
        name = f"{truth.mobile_species}{T}_{truth.lattice or truth.model}"
    os.makedirs(folder, exist_ok=True)
    path = os.path.join(os.fspath(folder), name + _WRITE_FORMATS[fmt] + (".gz" if compress else ""))
    species = list(traj.species)
    cells = np.asarray(traj.cells)
    positions = traj.positions
    dt = traj.frame_interval_ps
    if fmt == "xdatcar":  # wrapped coordinates only: the reader must be able to unwrap them
        from .unwrap import DEFAULT_MAX_STEP_FRACTION, cell_heights

        limit = DEFAULT_MAX_STEP_FRACTION * float(np.min(cell_heights(cells)))
        worst, where = 0.0, (0, 0)
        for idx, block in traj.iter_atom_blocks():
            step = np.sqrt(np.sum(np.diff(block, axis=0) ** 2, axis=2))
            if step.size and step.max() > worst:
                f, i = np.unravel_index(np.argmax(step), step.shape)
                worst, where = float(step[f, i]), (int(f) + 1, int(idx[i]))
        if worst > limit:
            raise UsageError(
                f"cannot write this run as XDATCAR: atom {where[1]} moves {worst:.3g} Å between "
                f"frames {where[0] - 1} and {where[0]}, more than {DEFAULT_MAX_STEP_FRACTION:g} "
                f"of the smallest box height ({limit:.3g} Å), so the wrapped file could not be "
                "unwrapped; write lammpsdump or extxyz (unwrapped coordinates), save frames "
                "more often, or use a larger box")
    card = {"frame_interval": _quantity(dt, "ps"), "mobile": [truth.mobile_species]}
    if traj.temperature_K is not None:
        card["temperature"] = _quantity(traj.temperature_K, "K")
    if fmt == "xdatcar":
        writers.write_xdatcar(path, species, cells, positions)
    elif fmt == "extxyz":
        writers.write_extxyz(path, species, cells, positions, times_ps=traj.times_ps,
                             unwrapped=True)
    else:
        steps = np.arange(traj.n_frames, dtype=np.int64) * steps_per_frame
        writers.write_lammps_dump(path, species, cells, positions, steps=steps, kind="unwrapped")
        symbols = list(traj.symbols)
        card.pop("frame_interval")
        card.update(md_timestep=_quantity(dt / steps_per_frame, "ps"), lammps_units="metal",
                    type_map={i + 1: s for i, s in enumerate(symbols)})
    write_runcard(path + ".runcard.toml", **card)
    return path
