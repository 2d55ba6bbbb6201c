"""Figures of diffkit results (matplotlib, no pyplot state).

Every function here draws results it is given and computes no physics: the
MSD curves, fit windows, diffusion coefficients, hop lists, running estimates
and Arrhenius bands all come from the analysis modules. Each function returns
a :class:`matplotlib.figure.Figure` built directly (never through
``matplotlib.pyplot``), so library users and tests can inspect the artists;
the artists that carry results have a ``gid`` (e.g. ``"msd"``, ``"fit-band"``)
to find them by.

Results may be passed as the result objects or as their ``to_dict()`` forms
(plain dicts of lists, as stored in run files and campaign JSON).

Look: the project's own palette (:data:`PALETTE`), chosen so that the four
series colours differ in lightness by at least 13 CIE L* units (readable in
greyscale) and avoid red–green contrasts; every series also has its own line
style and marker, so no information rests on colour alone.
"""

from __future__ import annotations

import contextlib
import io
import math
import os
from collections.abc import Mapping

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from ..errors import UsageError
from ..io.atomic import atomic_path

__all__ = [
    "PALETTE",
    "SERIES_STYLES",
    "FIGURE_FORMATS",
    "msd_figure",
    "axis_msd_figure",
    "hop_figure",
    "convergence_figure",
    "host_msd_figure",
    "arrhenius_figure",
    "arrhenius_overview_figure",
    "figure_bytes",
    "save_figure",
]

#: The project's palette. ``ink``, ``mulberry``, ``harbour`` and ``amber`` are the
#: series colours (CIE L* about 20, 38, 56 and 70); the rest are neutrals and tints.
PALETTE = {
    "ink": "#1c2f5e",        # deep navy
    "mulberry": "#9b2f66",   # dark purple-red
    "harbour": "#3a8dc4",    # mid blue
    "amber": "#e69b2e",      # warm orange
    "slate": "#5b6472",      # neutral text and guides
    "mist": "#c8d8e8",       # pale blue tint (bands)
    "sand": "#efe6d6",       # pale warm tint (fit windows)
    "rule": "#d5d9e0",       # grid lines
}

#: Styles of successive series: colour, line style and marker differ together.
SERIES_STYLES = (
    {"color": PALETTE["ink"], "linestyle": "-", "marker": "o"},
    {"color": PALETTE["mulberry"], "linestyle": "--", "marker": "s"},
    {"color": PALETTE["harbour"], "linestyle": "-.", "marker": "^"},
    {"color": PALETTE["amber"], "linestyle": ":", "marker": "D"},
)

#: File formats :func:`save_figure` writes by default.
FIGURE_FORMATS = ("png", "svg", "pdf")

_AXIS_NAMES = ("x", "y", "z")
_FONT = 10.0


# =========================================================================== helpers
def _get(obj, name, default=None):
    """A field of a result object or of its ``to_dict()`` form."""
    if obj is None:
        return default
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _arr(obj, name):
    v = _get(obj, name)
    if v is None:
        return None
    return np.asarray(v, dtype=float)


def _num(v):
    """float(v), or NaN for None."""
    try:
        return math.nan if v is None else float(v)
    except (TypeError, ValueError):
        return math.nan


_MORE_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "h")
_MORE_LINESTYLES = ("-", "--", "-.", ":")


def _style(i):
    """Style of series i: the four base styles, then new marker and line-style pairings."""
    if i < len(SERIES_STYLES):
        return SERIES_STYLES[i]
    base = SERIES_STYLES[i % len(SERIES_STYLES)]
    return {"color": base["color"], "marker": _MORE_MARKERS[i % len(_MORE_MARKERS)],
            "linestyle": _MORE_LINESTYLES[(i // len(SERIES_STYLES) + i) % len(_MORE_LINESTYLES)]}


def _new_figure(width_in=6.4, height_in=4.2, *, left_in=0.9, right_in=0.22, bottom_in=0.6,
                top_in=0.45):
    """A white figure with fixed margins in inches (a layout engine is several times slower)."""
    fig = Figure(figsize=(width_in, height_in), dpi=100)
    fig.patch.set_facecolor("white")
    fig.subplots_adjust(left=left_in / width_in, right=1.0 - right_in / width_in,
                        bottom=bottom_in / height_in, top=1.0 - top_in / height_in)
    return fig


def _dress(ax, *, xlabel=None, ylabel=None, title=None):
    """The house look of one set of axes."""
    ax.set_facecolor("white")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(PALETTE["slate"])
        ax.spines[side].set_linewidth(0.8)
    ax.tick_params(labelsize=_FONT - 0.5, colors=PALETTE["slate"], direction="out",
                   length=3.5, width=0.8)
    ax.tick_params(which="minor", length=2.0, width=0.6, colors=PALETTE["slate"])
    ax.grid(True, which="major", color=PALETTE["rule"], linewidth=0.6)
    ax.set_axisbelow(True)
    if xlabel:
        ax.set_xlabel(xlabel, fontsize=_FONT, color="#222222")
    if ylabel:
        ax.set_ylabel(ylabel, fontsize=_FONT, color="#222222")
    if title:
        # an explicit y skips matplotlib's costly automatic title placement
        ax.set_title(title, fontsize=_FONT + 1, loc="left", color="#111111", fontweight="bold",
                     y=1.01)


def _legend(ax, **kw):
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        leg = ax.legend(fontsize=_FONT - 1, frameon=True, framealpha=0.92,
                        edgecolor=PALETTE["rule"], **kw)
        leg.get_frame().set_linewidth(0.6)
        return leg
    return None


def _note(ax, text, *, loc="center"):
    """A short message written on the axes (e.g. "no hops detected")."""
    pos = {"center": (0.5, 0.5, "center", "center"),
           "upper left": (0.03, 0.96, "left", "top"),
           "lower right": (0.97, 0.04, "right", "bottom")}[loc]
    return ax.text(pos[0], pos[1], text, transform=ax.transAxes, ha=pos[2], va=pos[3],
                   fontsize=_FONT - 0.5, color=PALETTE["slate"], wrap=True,
                   bbox={"boxstyle": "round,pad=0.35", "facecolor": "white",
                         "edgecolor": PALETTE["rule"], "linewidth": 0.6})


def _plain_tick(value, _pos=None):
    """Log-axis tick label as a plain number (0.01, 1, 100; 1e+05 beyond)."""
    return f"{value:g}"


def _window(estimate):
    w = _get(estimate, "fit_window_ps")
    if w is None:
        return None
    lo, hi = _num(w[0]), _num(w[1])
    return (lo, hi) if (math.isfinite(lo) and math.isfinite(hi) and hi > lo) else None


def _species_text(obj):
    sp = _get(obj, "species", ())
    if isinstance(sp, str):
        return sp
    return "+".join(str(s) for s in sp) if sp else "ions"


def _sci(v, digits=3):
    """Number in a compact scientific form, e.g. 3.81×10⁻⁵ written as '3.81e-05'."""
    return "n/a" if not math.isfinite(v) else f"{v:.{digits}g}"


# =========================================================================== MSD
def msd_figure(curve, estimate=None, *, show_collective=True, title=None):
    """Mean-squared displacement against lag time, log–log.

    Draws the time-origin-averaged MSD (``gid="msd"``), optionally the
    collective MSD per ion (``"collective-msd"``), the fit window shaded
    (``"fit-window"``), the fitted line offset + 6 D t over the window
    (``"fit-line"``, only when D is a measured value, not a bound) and a guide of
    slope 1 (``"diffusive-guide"``) through the fitted line at the window's end
    (or through the last MSD point without an estimate).

    Parameters
    ----------
    curve : MSDCurve or its dict
        From :func:`diffkit.compute_msd`; lag 0 is not drawn (log axis).
    estimate : DiffusionEstimate or its dict, optional
        From :func:`diffkit.diffusion.estimate_diffusion`.
    show_collective : bool
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    t = _arr(curve, "lag_ps")
    y = _arr(curve, "msd_A2")
    if t is None or y is None:
        raise UsageError("msd_figure needs an MSD curve with lag_ps and msd_A2")
    fig = _new_figure()
    ax = fig.add_subplot()
    sp = _species_text(curve)
    _dress(ax, xlabel="lag time (ps)", ylabel="MSD (Å²)",
           title=title or f"Mean-squared displacement of {sp}")
    ax.set_xscale("log")
    ax.set_yscale("log")
    for axis in (ax.xaxis, ax.yaxis):     # fewer minor ticks, plain decimal labels
        axis.set_major_locator(LogLocator(base=10.0))
        axis.set_major_formatter(FuncFormatter(_plain_tick))
        axis.set_minor_locator(LogLocator(base=10.0, subs=(2.0, 5.0)))
        axis.set_minor_formatter(NullFormatter())
    keep = (t > 0) & (y > 0)
    win = _window(estimate)
    if win is not None:
        ax.axvspan(win[0], win[1], color=PALETTE["sand"], alpha=1.0, lw=0, zorder=0,
                   label=f"fit window {win[0]:.3g}–{win[1]:.3g} ps", gid="fit-window")
    ax.plot(t[keep], y[keep], color=PALETTE["ink"], lw=1.8,
                          label=f"MSD of {sp} (tracer)", gid="msd", zorder=3)
    coll = _arr(curve, "collective_A2")
    if show_collective and coll is not None:
        kc = (t > 0) & (coll > 0)
        ax.plot(t[kc], coll[kc], color=PALETTE["amber"], lw=1.1, ls="--",
                label="collective MSD per ion", gid="collective-msd", zorder=2)
    D = _num(_get(estimate, "D_A2_per_ps"))
    offset = _num(_get(estimate, "offset_A2"))
    bound = bool(_get(estimate, "is_upper_bound", False))
    anchor = None
    if win is not None and math.isfinite(D) and math.isfinite(offset) and not bound:
        tf = np.linspace(win[0], win[1], 64)
        yf = offset + 6.0 * D * tf
        ok = yf > 0
        D_cm = _num(_get(estimate, "D_cm2_per_s"))
        se_cm = _num(_get(estimate, "D_stderr_cm2_per_s"))
        ax.plot(tf[ok], yf[ok], color=PALETTE["mulberry"], lw=1.4, ls="-.",
                label=f"fit: D = {_sci(D_cm)} ± {_sci(se_cm, 2)} cm²/s", gid="fit-line",
                zorder=4)
        if yf[-1] > 0:
            anchor = (win[1], float(yf[-1]))
    elif keep.any():
        anchor = (float(t[keep][-1]), float(y[keep][-1]))
    if anchor is not None and keep.any():
        tg = np.array([float(t[keep][0]), float(t[keep][-1])])
        ax.plot(tg, anchor[1] * tg / anchor[0], color=PALETTE["slate"], lw=1.0, ls=":",
                label="slope 1 (diffusive)", gid="diffusive-guide", zorder=1)
    if bound:
        D_cm = _num(_get(estimate, "D_cm2_per_s"))
        _note(ax, f"ions did not move measurably:\nD < {_sci(D_cm)} cm²/s (95% upper bound)",
              loc="lower right")
    elif estimate is not None and not math.isfinite(D):
        _note(ax, "no diffusive fit window found", loc="lower right")
    if not keep.any():
        _note(ax, "MSD is zero at every lag")
    _legend(ax, loc="upper left")
    return fig


def axis_msd_figure(curve, estimate=None, *, title=None):
    """Per-axis MSD (x, y, z) against lag time, linear axes.

    Lines have ``gid`` ``"msd-x"``, ``"msd-y"``, ``"msd-z"``; the fit window is
    shaded (``"fit-window"``). The legend gives each axis's D where the estimate
    holds per-axis values.

    Parameters
    ----------
    curve : MSDCurve or its dict
    estimate : DiffusionEstimate or its dict, optional
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    t = _arr(curve, "lag_ps")
    axes = _arr(curve, "msd_axes_A2")
    if t is None or axes is None or axes.ndim != 2 or axes.shape[1] != 3:
        raise UsageError("axis_msd_figure needs an MSD curve with lag_ps and msd_axes_A2 (n, 3)")
    fig = _new_figure()
    ax = fig.add_subplot()
    sp = _species_text(curve)
    _dress(ax, xlabel="lag time (ps)", ylabel="MSD along one axis (Å²)",
           title=title or f"Per-axis MSD of {sp}")
    win = _window(estimate)
    if win is not None:
        ax.axvspan(win[0], win[1], color=PALETTE["sand"], lw=0, zorder=0, label="fit window",
                   gid="fit-window")
    D_axes = _arr(estimate, "D_axes_cm2_per_s")
    se_axes = _arr(estimate, "D_axes_stderr_cm2_per_s")
    bound = bool(_get(estimate, "is_upper_bound", False))
    every = max(1, len(t) // 12)
    for a in range(3):
        st = _style(a)
        label = f"{_AXIS_NAMES[a]}"
        if D_axes is not None and len(D_axes) == 3 and math.isfinite(D_axes[a]) and not bound:
            se = se_axes[a] if se_axes is not None and len(se_axes) == 3 else math.nan
            label += f": D = {_sci(D_axes[a])} ± {_sci(se, 2)} cm²/s"
        ax.plot(t, axes[:, a], color=st["color"], ls=st["linestyle"], marker=st["marker"],
                markevery=(a * every // 3, every), ms=4, lw=1.5, mfc="white", mew=1.0,
                label=label, gid=f"msd-{_AXIS_NAMES[a]}", zorder=3)
    dim = _get(estimate, "dimensionality")
    if dim:
        _note(ax, f"pattern of motion: {dim}", loc="lower right")
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    _legend(ax, loc="upper left")
    return fig


# =========================================================================== hops
def hop_figure(hops, *, title=None, max_ions_labelled=40):
    """When each ion hopped (raster) and how often (bars), side by side.

    The raster (``gid="hop-raster"``) has one row per ion, in the order of
    ``hops_per_ion``, and a tick at every hop time; the bars (``"hop-counts"``)
    give each ion's hop count.

    Parameters
    ----------
    hops : HopSummary or its dict
    title : str, optional
    max_ions_labelled : int
        Ion rows are labelled with atom indices up to this many ions.

    Returns
    -------
    matplotlib.figure.Figure
    """
    per_ion = _arr(hops, "hops_per_ion")
    if per_ion is None:
        raise UsageError("hop_figure needs a hop summary with hops_per_ion")
    ion_indices = np.asarray(_get(hops, "ion_indices", np.arange(len(per_ion))), dtype=int)
    times = _arr(hops, "hop_times_ps")
    who = np.asarray(_get(hops, "hop_ions", []), dtype=int)
    times = np.zeros(0) if times is None else times
    row_of = {int(a): i for i, a in enumerate(ion_indices)}
    rows = np.array([row_of.get(int(a), -1) for a in who], dtype=float)
    n = len(per_ion)
    height = float(np.clip(2.2 + 0.06 * n, 3.2, 6.5))
    fig = _new_figure(7.2, height, left_in=0.95)
    grid = fig.add_gridspec(1, 2, width_ratios=(4.2, 1.0), wspace=0.04)
    ax = fig.add_subplot(grid[0, 0])
    axc = fig.add_subplot(grid[0, 1], sharey=ax)
    sp = _get(hops, "species", "ions")
    total = int(_num(_get(hops, "total_hops", len(times))))
    dur = _num(_get(hops, "duration_ps"))
    _dress(ax, xlabel="simulated time (ps)", ylabel=f"{sp} ion (row)",
           title=title or f"Hops of {sp}: {total} in {dur:g} ps")
    _dress(axc, xlabel="hops per ion")
    mark = "|" if n > 3 else "o"
    ax.plot(times, rows, ls="none", marker=mark, ms=max(2.5, min(9.0, 220.0 / max(n, 1))),
            mew=1.0, color=PALETTE["ink"], gid="hop-raster", label="hop")
    axc.barh(np.arange(n), per_ion, height=0.72, color=PALETTE["harbour"],
             edgecolor=PALETTE["ink"], linewidth=0.4, gid="hop-counts")
    if math.isfinite(dur) and dur > 0:
        ax.set_xlim(0, dur)
    ax.set_ylim(-0.7, n - 0.3)
    ax.invert_yaxis()
    if n <= max_ions_labelled:
        step = max(1, math.ceil(n / 16))            # at most ~16 labels stay readable
        rows_shown = np.arange(0, n, step)
        ax.set_yticks(rows_shown, [str(ion_indices[i]) for i in rows_shown],
                      fontsize=_FONT - 1.5)
        ax.set_ylabel(f"{sp} ion (atom index)", fontsize=_FONT)
    ax.grid(False, axis="y")
    axc.grid(False, axis="y")
    axc.tick_params(labelleft=False)
    axc.set_xlim(left=0)
    if len(times) == 0:
        _note(ax, "no hops detected in this run")
    return fig


# =========================================================================== convergence
def convergence_figure(times_ps=None, D_cm2_per_s=None, lower_cm2_per_s=None,
                       upper_cm2_per_s=None, *, running=None, final=None, title=None):
    """The diffusion coefficient estimated from the first part of a run, against its length.

    The running estimate and its 95% band (``gid="running-D"``,
    ``"running-band"``) come precomputed, as arrays or as an object with the
    fields ``times_ps``, ``D_cm2_per_s``, ``lower_cm2_per_s`` and
    ``upper_cm2_per_s`` (``running=``). The final estimate of the whole run, when
    given, is drawn as a horizontal line (``"final-D"``) with its 95% interval
    (``"final-band"``). A run has converged when the curve has settled inside
    the final band.

    Parameters
    ----------
    times_ps : (m,) float, ps
        Simulated time used for each estimate (the length of the leading part).
    D_cm2_per_s, lower_cm2_per_s, upper_cm2_per_s : (m,) float, cm²/s
        Estimate and its 95% interval at each length (NaN where there is none).
    running : object or dict, optional
        Holds the four arrays instead.
    final : DiffusionEstimate or its dict, optional
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    if running is not None:
        times_ps = _get(running, "times_ps", times_ps)
        D_cm2_per_s = _get(running, "D_cm2_per_s", D_cm2_per_s)
        lower_cm2_per_s = _get(running, "lower_cm2_per_s", lower_cm2_per_s)
        upper_cm2_per_s = _get(running, "upper_cm2_per_s", upper_cm2_per_s)
    if times_ps is None or D_cm2_per_s is None:
        raise UsageError("convergence_figure needs times_ps and D_cm2_per_s (or running=)")
    t = np.asarray(times_ps, dtype=float)
    D = np.asarray(D_cm2_per_s, dtype=float)
    if t.shape != D.shape:
        raise UsageError(f"convergence_figure: times_ps {t.shape} and D_cm2_per_s {D.shape} "
                         "must have the same shape")
    fig = _new_figure()
    ax = fig.add_subplot()
    _dress(ax, xlabel="simulated time used (ps)", ylabel="D (cm²/s)",
           title=title or "Convergence of the diffusion coefficient")
    if lower_cm2_per_s is not None and upper_cm2_per_s is not None:
        lo = np.asarray(lower_cm2_per_s, dtype=float)
        hi = np.asarray(upper_cm2_per_s, dtype=float)
        if lo.shape != t.shape or hi.shape != t.shape:
            raise UsageError("convergence_figure: the band arrays must match times_ps in shape")
        ok = np.isfinite(lo) & np.isfinite(hi)
        ax.fill_between(t[ok], lo[ok], hi[ok], color=PALETTE["mist"], lw=0,
                        label="95% interval", gid="running-band", zorder=1)
    Df = _num(_get(final, "D_cm2_per_s"))
    if final is not None and math.isfinite(Df):
        flo, fhi = (_num(v) for v in (_get(final, "D_interval95_cm2_per_s") or (math.nan,) * 2))
        if math.isfinite(flo) and math.isfinite(fhi):
            ax.axhspan(flo, fhi, color=PALETTE["sand"], lw=0, zorder=0,
                       label="whole run, 95% interval", gid="final-band")
        word = "upper bound" if _get(final, "is_upper_bound", False) else "whole run"
        ax.axhline(Df, color=PALETTE["mulberry"], lw=1.2, ls="--",
                   label=f"{word}: {_sci(Df)} cm²/s", gid="final-D", zorder=2)
    ok = np.isfinite(D)
    ax.plot(t[ok], D[ok], color=PALETTE["ink"], lw=1.6, marker="o", ms=3.5, mfc="white",
            label="estimate from the run's first part", gid="running-D", zorder=3)
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    ax.ticklabel_format(axis="y", style="sci", scilimits=(-2, 3))
    ax.yaxis.get_offset_text().set_fontsize(_FONT - 1)
    if not ok.any():
        _note(ax, "no running estimate available")
    _legend(ax, loc="lower right")
    return fig


# =========================================================================== host
def host_msd_figure(curves, *, threshold_A2=None, title=None):
    """MSD of the host (framework) species against lag time: is the host stable?

    A crystalline host vibrates about its sites, so its MSD levels off; a
    host MSD that keeps rising means the framework is melting, decomposing or
    amorphising. One line per curve (``gid="host-msd-<label>"``); an optional
    limit is drawn as ``"host-limit"``.

    Parameters
    ----------
    curves : mapping of str to MSDCurve (or dicts), or a sequence of MSDCurve
        Labels default to the curves' species.
    threshold_A2 : float, Å², optional
        A limit the caller judges against (e.g. from the run assessment).
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    if isinstance(curves, Mapping) and "lag_ps" in curves:
        curves = [curves]
    if isinstance(curves, Mapping):
        items = list(curves.items())
    else:
        items = [(_species_text(c), c) for c in curves]
    if not items:
        raise UsageError("host_msd_figure needs at least one host MSD curve")
    fig = _new_figure()
    ax = fig.add_subplot()
    _dress(ax, xlabel="lag time (ps)", ylabel="MSD (Å²)",
           title=title or "Host stability: MSD of the framework species")
    for i, (label, c) in enumerate(items):
        t = _arr(c, "lag_ps")
        y = _arr(c, "msd_A2")
        if t is None or y is None:
            raise UsageError(f"host curve {label!r} has no lag_ps / msd_A2")
        st = _style(i)
        every = max(1, len(t) // 10)
        ax.plot(t, y, color=st["color"], ls=st["linestyle"], marker=st["marker"], ms=4,
                markevery=(i * every // max(len(items), 1), every), mfc="white", mew=1.0,
                lw=1.5, label=str(label), gid=f"host-msd-{label}", zorder=3)
    if threshold_A2 is not None and math.isfinite(_num(threshold_A2)):
        ax.axhline(float(threshold_A2), color=PALETTE["slate"], lw=1.0, ls=(0, (6, 3)),
                   label=f"limit {float(threshold_A2):.3g} Å²", gid="host-limit", zorder=2)
    ax.set_xlim(left=0)
    ax.set_ylim(bottom=0)
    _legend(ax, loc="upper left")
    return fig


# =========================================================================== Arrhenius
_NICE_T = (200, 250, 300, 350, 400, 500, 600, 700, 800, 1000, 1200, 1500, 2000, 2500, 3000)


def _inverse_1000(x):
    x = np.asarray(x, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(x != 0, 1000.0 / np.where(x != 0, x, 1.0), np.inf)


def _arrhenius_axes(fig, T_lo, T_hi, *, ylabel, title, target_K=None):
    ax = fig.add_subplot()
    _dress(ax, xlabel="1000 / T (K⁻¹)", ylabel=ylabel)
    x_lo, x_hi = 1000.0 / T_hi, 1000.0 / T_lo
    pad = 0.04 * (x_hi - x_lo)
    ax.set_xlim(x_lo - pad, x_hi + pad)
    top = ax.secondary_xaxis("top", functions=(_inverse_1000, _inverse_1000))
    x_min, x_max = x_lo - pad, x_hi + pad
    gap = 0.09 * (x_max - x_min)
    ticks, last = [], None
    for T in sorted(_NICE_T, reverse=True):          # left to right in 1000/T
        x = 1000.0 / T
        if x_min <= x <= x_max and (last is None or x - last >= gap):
            ticks.append(T)
            last = x
    if target_K is not None and target_K not in ticks:     # the target always gets a tick
        ticks = [T for T in ticks if abs(1000.0 / T - 1000.0 / target_K) >= gap] + [target_K]
        ticks.sort(reverse=True)
    top.set_ticks(ticks, [f"{T:g}" for T in ticks])
    top.set_xlabel("temperature (K)", fontsize=_FONT, color="#222222")
    top.tick_params(labelsize=_FONT - 0.5, colors=PALETTE["slate"], length=3.5, width=0.8)
    top.spines["top"].set_color(PALETTE["slate"])
    top.spines["top"].set_linewidth(0.8)
    if title:
        ax.set_title(title, fontsize=_FONT + 1, loc="left", color="#111111", fontweight="bold",
                     y=1.13)
    return ax


def _fit_transform(fit):
    """(y label, f(values, T) -> y, f(ln_values, T) -> y, scale of ln errors) for a fit."""
    q = _get(fit, "quantity", "D")
    if q == "sigma_T":
        # the fit is of ln(σT); σ = (σT) / T, drawn as log10 σ
        def from_values(v, T):
            return np.log10(np.asarray(v, float) / np.asarray(T, float))

        def from_ln(lv, T):
            return (np.asarray(lv, float) - np.log(np.asarray(T, float))) / math.log(10.0)

        return "log₁₀(σ / S cm⁻¹)", from_values, from_ln, 1.0 / math.log(10.0), "σ", "S/cm"

    def from_values(v, T):
        return np.log(np.asarray(v, float))

    def from_ln(lv, T):
        return np.asarray(lv, float)

    return "ln(D / cm² s⁻¹)", from_values, from_ln, 1.0, "D", "cm²/s"


def _fit_of(obj):
    """The ArrheniusFit inside a CandidateSummary (or the object itself)."""
    if obj is None:
        return None
    if _get(obj, "Ea_eV") is not None and _get(obj, "ln_prefactor") is not None:
        return _as_fit_object(obj)
    inner = _get(obj, "fit")
    return None if inner is None else _as_fit_object(inner)


def _as_fit_object(fit):
    """An ArrheniusFit from its ``to_dict()`` form (so its own band methods can be used).

    Returns the object unchanged when it is not a dict, and None when the dict
    does not describe a fit.
    """
    if not isinstance(fit, Mapping):
        return fit
    import dataclasses

    from ..arrhenius import ArrheniusFit

    kwargs = {}
    try:
        for f in dataclasses.fields(ArrheniusFit):
            if f.name not in fit:
                if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING:
                    return None
                continue
            v = fit[f.name]
            if f.name in ("covariance", "temperatures_K", "ln_values", "ln_stderr",
                          "Ea_leave_one_out_eV"):
                v = np.asarray([math.nan if x is None else x for x in np.ravel(v)],
                               dtype=float).reshape(np.shape(v))
            elif isinstance(v, list):
                v = tuple(v)
            elif v is None and f.type in ("float", float):
                v = math.nan
            kwargs[f.name] = v
        for name in ("chi2", "chi2_reduced", "curvature_p_value", "Ea_leave_one_out_spread_eV"):
            if kwargs.get(name) is None:
                kwargs[name] = math.nan
        return ArrheniusFit(**kwargs)
    except (TypeError, ValueError):
        return None


def _band(fit, T):
    """The fit's own 95% band on temperatures T (None when it cannot be evaluated)."""
    band = getattr(fit, "band", None)
    return None if band is None else band(T)


def _draw_fit(ax, fit, target_K, style, *, label_prefix="", gid_suffix="", show_band=True,
              show_target=True):
    ylabel, from_values, from_ln, err_scale, sym, unit = _fit_transform(fit)
    T = np.asarray(_get(fit, "temperatures_K"), dtype=float)
    ln_v = np.asarray(_get(fit, "ln_values"), dtype=float)
    ln_e = np.asarray(_get(fit, "ln_stderr"), dtype=float)
    lo_K, hi_K = (float(v) for v in _get(fit, "fitted_range_K"))
    T_min = min(lo_K, target_K)
    grid_fit = np.linspace(1000.0 / hi_K, 1000.0 / lo_K, 60)
    grid_ext = np.linspace(1000.0 / lo_K, 1000.0 / T_min, 60)
    grid_all = np.concatenate([grid_fit, grid_ext[1:]])
    band = _band(fit, 1000.0 / grid_all)
    if band is not None:
        if show_band:
            ax.fill_between(grid_all, from_values(band.lower95, band.temperatures_K),
                            from_values(band.upper95, band.temperatures_K),
                            color=style.get("band", PALETTE["mist"]), alpha=style.get("alpha", 1.0),
                            lw=0, zorder=1, label=f"{label_prefix}95% band of the line",
                            gid="fit-band" + gid_suffix)
        yv = from_values(band.value, band.temperatures_K)
        n_fit = len(grid_fit)
        Ea, se = _num(_get(fit, "Ea_eV")), _num(_get(fit, "Ea_stderr_eV"))
        ax.plot(grid_all[:n_fit], yv[:n_fit], color=style["color"], lw=1.8, ls="-",
                label=f"{label_prefix}fit: Ea = {Ea:.3f} ± {se:.3f} eV",
                gid="fit-line" + gid_suffix, zorder=3)
        ax.plot(grid_all[n_fit - 1:], yv[n_fit - 1:], color=style["color"], lw=1.4, ls="--",
                gid="fit-line-extrapolated" + gid_suffix, zorder=3,
                label=f"{label_prefix}extrapolation" if not label_prefix else None)
    x = 1000.0 / T
    y = from_ln(ln_v, T)
    ax.errorbar(x, y, yerr=ln_e * err_scale, ls="none", marker=style["marker"], ms=6,
                mfc="white", mec=style["color"], mew=1.4, ecolor=style["color"], elinewidth=1.1,
                capsize=2.5, zorder=5, label=f"{label_prefix}simulated (±1 s.e.)",
                gid="data" + gid_suffix)
    ub = list(_get(fit, "upper_bounds", ()) or ())
    if ub:
        Tb = np.array([_num(_get(b, "temperature_K")) for b in ub])
        vb = np.array([_num(_get(b, "upper_bound")) for b in ub])
        conflict = np.array([bool(_get(b, "conflict", False)) for b in ub])
        yb = from_values(vb, Tb)
        ax.plot(1000.0 / Tb, yb, ls="none", marker="v", ms=8, mfc=style["color"],
                mec=style["color"], zorder=5, gid="upper-bounds" + gid_suffix,
                label=f"{label_prefix}no hops: 95% upper bound")
        # a downward arrow under each bound (length ~ a factor 1.8 in the value)
        ax.errorbar(1000.0 / Tb, yb, yerr=0.6 * err_scale, uplims=True, ls="none",
                    color=style["color"], ecolor=style["color"], elinewidth=1.0, capsize=3,
                    zorder=4)
        if conflict.any():
            ax.plot(1000.0 / Tb[conflict], yb[conflict], ls="none", marker="o", ms=13,
                    mfc="none", mec=PALETTE["mulberry"], mew=1.2, zorder=6,
                    gid="upper-bound-conflicts" + gid_suffix,
                    label=f"{label_prefix}bound conflicts with the fit")
    if show_target and band is not None:
        p = fit.extrapolate(target_K)
        yt = float(from_values(p.value, target_K))
        ylo, yhi = (float(from_values(v, target_K)) for v in p.interval95)
        ax.errorbar([1000.0 / target_K], [yt], yerr=[[yt - ylo], [yhi - yt]], ls="none",
                    marker="*", ms=11, color=style["color"], mfc=style["color"],
                    capsize=4, elinewidth=1.3, zorder=6, gid="target" + gid_suffix,
                    label=f"{label_prefix}{sym}({target_K:g} K), 95% band")
    return ylabel


def arrhenius_figure(fit, *, target_K=300.0, title=None):
    """Arrhenius plot: ln D (or log₁₀ σ) against 1000/T with the fit and its band.

    Draws the fitted temperatures with ±1 standard error (``gid="data"``), the
    fitted line over the simulated range (``"fit-line"``), its continuation to
    the target temperature (``"fit-line-extrapolated"``), the 95% confidence
    band of the line from the hottest run down to the target
    (``"fit-band"``, from ``fit.band``), the value at the target with its 95%
    band (``"target"``, from ``fit.extrapolate``), and no-hop temperatures as
    downward triangles at their upper bounds (``"upper-bounds"``). A secondary
    axis on top gives the temperature in K.

    For a fit of ln D the y axis is ln(D / cm² s⁻¹); for a fit of ln(σT) it is
    log₁₀(σ / S cm⁻¹), with σ = (σT) / T.

    Parameters
    ----------
    fit : ArrheniusFit or CandidateSummary (its ``fit``)
    target_K : float, K
        Temperature the band is extended to (the screening temperature).
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    name = _get(fit, "name") if _get(fit, "fit") is not None or _get(fit, "tier") else None
    f = _fit_of(fit)
    fig = _new_figure(6.4, 4.6, top_in=0.9)
    if f is None:
        ax = fig.add_subplot()
        _dress(ax, title=title or "Arrhenius plot")
        ax.set_xticks([])
        ax.set_yticks([])
        _note(ax, "no Arrhenius fit: fewer than two temperatures gave a diffusion coefficient")
        return fig
    target_K = float(target_K)
    lo_K, hi_K = (float(v) for v in _get(f, "fitted_range_K"))
    Tb = [_num(_get(b, "temperature_K")) for b in (_get(f, "upper_bounds", ()) or ())]
    T_lo = min([lo_K, target_K] + Tb)
    T_hi = max([hi_K] + Tb)
    ylabel = _fit_transform(f)[0]
    head = title or ("Arrhenius plot" + (f" — {name}" if name else ""))
    ax = _arrhenius_axes(fig, T_lo, T_hi, ylabel=ylabel, title=head, target_K=target_K)
    style = dict(_style(0))
    _draw_fit(ax, f, target_K, style)
    ax.axvline(1000.0 / target_K, color=PALETTE["slate"], lw=0.8, ls=":", zorder=0)
    _legend(ax, loc="lower left")
    return fig


def arrhenius_overview_figure(fits, *, target_K=300.0, title=None):
    """Several candidates' Arrhenius fits on one plot (campaign overview).

    Each candidate gets one series style; lines and bands have gids
    ``"fit-line-<i>"``, ``"fit-band-<i>"``, ``"data-<i>"`` with ``i`` the
    position in ``fits``.

    Parameters
    ----------
    fits : mapping of candidate name to ArrheniusFit / CandidateSummary (None skipped)
    target_K : float, K
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    target_K = float(target_K)
    items = [(str(k), _fit_of(v)) for k, v in fits.items()]
    items = [(k, f) for k, f in items if f is not None]
    fig = _new_figure(7.0, 4.8, top_in=0.9)
    if not items:
        ax = fig.add_subplot()
        _dress(ax, title=title or "Arrhenius overview")
        ax.set_xticks([])
        ax.set_yticks([])
        _note(ax, "no candidate has an Arrhenius fit")
        return fig
    kinds = {_get(f, "quantity", "D") for _, f in items}
    if len(kinds) > 1:
        raise UsageError("arrhenius_overview_figure: all fits must be of the same quantity "
                         f"(got {sorted(kinds)})")
    lows = [min(float(_get(f, "fitted_range_K")[0]), target_K) for _, f in items]
    highs = [float(_get(f, "fitted_range_K")[1]) for _, f in items]
    bounds = [_num(_get(b, "temperature_K")) for _, f in items
              for b in (_get(f, "upper_bounds", ()) or ())]
    ylabel = _fit_transform(items[0][1])[0]
    ax = _arrhenius_axes(fig, min(lows + bounds), max(highs + bounds), ylabel=ylabel,
                         target_K=target_K,
                         title=title or f"Arrhenius overview, extrapolated to {target_K:g} K")
    for i, (name, f) in enumerate(items):
        st = dict(_style(i))
        st["band"] = st["color"]
        st["alpha"] = 0.13
        _draw_fit(ax, f, target_K, st, label_prefix=f"{name}: ", gid_suffix=f"-{i}",
                  show_target=True)
    # one legend entry per candidate, showing its marker and line (readable in greyscale)
    from matplotlib.lines import Line2D

    handles, labels = [], []
    for i, (name, f) in enumerate(items):
        st = _style(i)
        handles.append(Line2D([], [], color=st["color"], marker=st["marker"], mfc="white",
                              mec=st["color"], mew=1.4, ms=6, lw=1.8))
        labels.append(f"{name}: Ea = {_num(_get(f, 'Ea_eV')):.3f} ± "
                      f"{_num(_get(f, 'Ea_stderr_eV')):.3f} eV")
    leg = ax.legend(handles, labels, fontsize=_FONT - 1, loc="lower left", frameon=True,
                    framealpha=0.92, edgecolor=PALETTE["rule"])
    leg.get_frame().set_linewidth(0.6)
    ax.axvline(1000.0 / target_K, color=PALETTE["slate"], lw=0.8, ls=":", zorder=0)
    return fig


# =========================================================================== output
@contextlib.contextmanager
def _reproducible_svg():
    # matplotlib salts SVG element ids with a random value unless told otherwise;
    # a fixed salt makes the same figure give the same file (set only while saving)
    import matplotlib

    with matplotlib.rc_context({"svg.hashsalt": "diffkit"}):
        yield


_METADATA = {"png": {"Software": None}, "svg": {"Date": None, "Creator": None},
             "pdf": {"CreationDate": None, "ModDate": None, "Creator": None, "Producer": None}}


def figure_bytes(fig, fmt="png", *, dpi=150):
    """The figure encoded as PNG, SVG or PDF bytes (no timestamps: same figure, same bytes).

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    fmt : {"png", "svg", "pdf"}
    dpi : float
        Resolution of raster output (PNG).

    Returns
    -------
    bytes
    """
    if fmt not in FIGURE_FORMATS:
        raise UsageError(f"figure format must be one of {', '.join(FIGURE_FORMATS)}; got {fmt!r}")
    buf = io.BytesIO()
    ctx = _reproducible_svg() if fmt == "svg" else contextlib.nullcontext()
    with ctx:
        fig.savefig(buf, format=fmt, dpi=dpi, facecolor="white", metadata=_METADATA[fmt])
    return buf.getvalue()


def save_figure(fig, path, *, formats=FIGURE_FORMATS, dpi=200):
    """Write a figure to PNG, SVG and PDF files, each atomically.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    path : str or path-like
        File name without extension (an extension among ``formats`` is dropped).
    formats : sequence of {"png", "svg", "pdf"}
    dpi : float
        Resolution of the PNG.

    Returns
    -------
    list of str
        The files written, in the order of ``formats``.
    """
    path = os.fspath(path)
    stem, ext = os.path.splitext(path)
    if ext.lstrip(".").lower() not in FIGURE_FORMATS:
        stem = path
    formats = tuple(formats)
    if not formats:
        raise UsageError("save_figure: give at least one format")
    for fmt in formats:
        if fmt not in FIGURE_FORMATS:
            raise UsageError(f"figure format must be one of {', '.join(FIGURE_FORMATS)}; "
                             f"got {fmt!r}")
    written = []
    for fmt in formats:
        target = f"{stem}.{fmt}"
        data = figure_bytes(fig, fmt, dpi=dpi)
        with atomic_path(target) as tmp:
            with open(tmp, "wb") as f:
                f.write(data)
        written.append(target)
    return written
