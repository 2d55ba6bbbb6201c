"""Figures carry exactly the results they are given (checked through matplotlib objects).

Outside references used here: the Einstein relation MSD = 6 D t in three
dimensions (Einstein, Ann. Phys. 17, 549 (1905)); the Arrhenius slope
d ln D / d(1/T) = -Ea / k_B with k_B from scipy.constants (CODATA); the CIE
1976 L* lightness of sRGB colours (IEC 61966-2-1 transfer curve, CIE 15:2004);
the PNG signature (ISO/IEC 15948), the PDF header (ISO 32000-1) and the SVG
root element (W3C SVG 1.1).
"""

from __future__ import annotations

import math
import os

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PolyCollection
from matplotlib.colors import to_rgb
from matplotlib.image import imread
from scipy import constants

import diffkit
from diffkit.diffusion import estimate_diffusion
from diffkit.errors import UsageError
from diffkit.hops import count_hops
from diffkit.msd import compute_msd
from diffkit.report import plots

K_B_EV = constants.k / constants.e   # CODATA via scipy, independent of diffkit.units


# --------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def run_results():
    run = diffkit.hopping_run(n_ions=16, n_frames=400, frame_interval_ps=0.1, temperature_K=800.0,
                              Ea_eV=0.2, framework={"P": 4, "S": 16}, seed=7)
    traj = run.trajectory
    curve = compute_msd(traj, "Li")
    est = estimate_diffusion(curve)
    hops = count_hops(traj, "Li")
    host = {s: compute_msd(traj, s, per_ion=False, reference="all") for s in ("P", "S")}
    assert np.isfinite(est.D_A2_per_ps) and not est.is_upper_bound
    assert hops.total_hops > 0
    return curve, est, hops, host


@pytest.fixture(scope="module")
def fit_with_bound():
    # exact Arrhenius data with 3% errors and one no-hop temperature as an upper bound
    Ea, D0 = 0.25, 2e-3
    T = np.array([600.0, 750.0, 900.0, 1100.0])
    D = D0 * np.exp(-Ea / (K_B_EV * T))
    D = D * np.array([1.02, 0.98, 1.01, 0.99])
    bound_T, bound_D = 450.0, 5e-7
    fit = diffkit.fit_arrhenius(T, D, 0.03 * D, upper_bounds=[(bound_T, bound_D)])
    return fit, bound_T, bound_D


def _by_gid(fig, gid):
    found = [a for ax in fig.axes for a in ax.get_children() if a.get_gid() == gid]
    assert found, f"no artist with gid {gid!r}; have " + str(sorted(
        {a.get_gid() for ax in fig.axes for a in ax.get_children() if a.get_gid()}))
    return found


def _line(fig, gid):
    (ln,) = [a for a in _by_gid(fig, gid) if hasattr(a, "get_xdata")][:1]
    return np.asarray(ln.get_xdata(), float), np.asarray(ln.get_ydata(), float)


def _draw(fig):
    FigureCanvasAgg(fig).draw()


# --------------------------------------------------------------------------- MSD
def test_msd_figure_draws_the_curve_window_fit_and_guide(run_results):
    curve, est, _, _ = run_results
    fig = plots.msd_figure(curve, est)
    ax = fig.axes[0]
    assert ax.get_xscale() == "log" and ax.get_yscale() == "log"
    assert "ps" in ax.get_xlabel() and "Å²" in ax.get_ylabel()
    x, y = _line(fig, "msd")
    np.testing.assert_array_equal(x, curve.lag_ps[1:])          # lag 0 cannot be on a log axis
    np.testing.assert_array_equal(y, curve.msd_A2[1:])
    xc, yc = _line(fig, "collective-msd")
    np.testing.assert_array_equal(yc, curve.collective_A2[1:][curve.collective_A2[1:] > 0])
    # the shaded window spans exactly the reported fit window
    (span,) = _by_gid(fig, "fit-window")
    xs = span.get_path().transformed(span.get_patch_transform()).vertices[:, 0] \
        if hasattr(span, "get_patch_transform") else span.get_xy()[:, 0]
    assert min(xs) == pytest.approx(est.fit_window_ps[0], rel=1e-12)
    assert max(xs) == pytest.approx(est.fit_window_ps[1], rel=1e-12)
    # fitted line: MSD = c + 6 D t (Einstein relation, 3 dimensions)
    tf, yf = _line(fig, "fit-line")
    np.testing.assert_allclose(yf, est.offset_A2 + 6.0 * est.D_A2_per_ps * tf, rtol=1e-12)
    assert tf[0] == pytest.approx(est.fit_window_ps[0])
    assert tf[-1] == pytest.approx(est.fit_window_ps[1])
    # the diffusive guide has slope exactly 1 on log-log axes and meets the fit at the window end
    tg, yg = _line(fig, "diffusive-guide")
    slope = np.diff(np.log(yg)) / np.diff(np.log(tg))
    np.testing.assert_allclose(slope, 1.0, rtol=1e-12)
    t_end = est.fit_window_ps[1]
    y_end = est.offset_A2 + 6.0 * est.D_A2_per_ps * t_end
    at_end = np.interp(np.log(t_end), np.log(tg), np.log(yg))
    assert at_end == pytest.approx(np.log(y_end), rel=1e-9)


def test_msd_figure_for_an_upper_bound_has_no_fit_line(run_results):
    import dataclasses

    curve, est, _, _ = run_results
    bound = dataclasses.replace(est, is_upper_bound=True)
    fig = plots.msd_figure(curve, bound)
    gids = {a.get_gid() for a in fig.axes[0].get_children()}
    assert "fit-line" not in gids and "fit-window" in gids
    texts = " ".join(t.get_text() for t in fig.axes[0].texts)
    assert "upper bound" in texts


def test_plots_accept_the_dict_forms_of_results(run_results):
    curve, est, hops, _ = run_results
    a = plots.msd_figure(curve, est)
    b = plots.msd_figure(curve.to_dict(), est.to_dict())
    for gid in ("msd", "fit-line", "diffusive-guide"):
        np.testing.assert_allclose(_line(a, gid)[1], _line(b, gid)[1], rtol=1e-12)
    h1, h2 = plots.hop_figure(hops), plots.hop_figure(hops.to_dict())
    np.testing.assert_array_equal(_line(h1, "hop-raster")[0], _line(h2, "hop-raster")[0])


def test_axis_msd_figure_has_one_line_per_axis(run_results):
    curve, est, _, _ = run_results
    fig = plots.axis_msd_figure(curve, est)
    styles = set()
    for a, name in enumerate("xyz"):
        x, y = _line(fig, f"msd-{name}")
        np.testing.assert_array_equal(x, curve.lag_ps)
        np.testing.assert_array_equal(y, curve.msd_axes_A2[:, a])
        (ln,) = _by_gid(fig, f"msd-{name}")
        styles.add((ln.get_linestyle(), ln.get_marker()))
    assert len(styles) == 3          # told apart without colour
    labels = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert any("cm²/s" in lab for lab in labels)


# --------------------------------------------------------------------------- hops
def test_hop_figure_raster_and_counts_equal_the_hop_census(run_results):
    _, _, hops, _ = run_results
    fig = plots.hop_figure(hops)
    x, y = _line(fig, "hop-raster")
    np.testing.assert_array_equal(x, hops.hop_times_ps)
    row = {int(a): i for i, a in enumerate(hops.ion_indices)}
    np.testing.assert_array_equal(y, [row[int(a)] for a in hops.hop_ions])
    bars = _by_gid(fig, "hop-counts")                 # one rectangle per ion, in row order
    assert [b.get_y() + b.get_height() / 2 for b in bars] == pytest.approx(range(len(bars)))
    widths = np.array([b.get_width() for b in bars])
    np.testing.assert_array_equal(widths, hops.hops_per_ion)
    assert widths.sum() == hops.total_hops == len(x)
    # every ion's ticks are on its own row, as many as its count
    np.testing.assert_array_equal(np.bincount(y.astype(int), minlength=len(widths)), widths)


def test_hop_figure_without_hops_says_so(run_results):
    _, _, hops, _ = run_results
    d = hops.to_dict()
    d.update(hop_times_ps=[], hop_ions=[], total_hops=0,
             hops_per_ion=[0] * len(d["hops_per_ion"]))
    fig = plots.hop_figure(d)
    assert "no hops" in " ".join(t.get_text() for t in fig.axes[0].texts)


# --------------------------------------------------------------------------- convergence, host
def test_convergence_figure_band_spans_the_given_intervals(run_results):
    _, est, _, _ = run_results
    t = np.linspace(5.0, 40.0, 8)
    D = est.D_cm2_per_s * (1 + 0.5 / np.sqrt(t))
    lo, hi = 0.8 * D, 1.25 * D
    fig = plots.convergence_figure(t, D, lo, hi, final=est)
    x, y = _line(fig, "running-D")
    np.testing.assert_array_equal(x, t)
    np.testing.assert_array_equal(y, D)
    (band,) = _by_gid(fig, "running-band")
    v = band.get_paths()[0].vertices
    for ti, l, h in zip(t, lo, hi):
        at = v[np.isclose(v[:, 0], ti)]
        assert at[:, 1].min() == pytest.approx(l) and at[:, 1].max() == pytest.approx(h)
    _, yf = _line(fig, "final-D")
    assert yf[0] == pytest.approx(est.D_cm2_per_s)
    # the same from an object holding the arrays
    holder = {"times_ps": t, "D_cm2_per_s": D, "lower_cm2_per_s": lo, "upper_cm2_per_s": hi}
    from_holder = plots.convergence_figure(running=holder)
    np.testing.assert_array_equal(_line(from_holder, "running-D")[1], D)
    with pytest.raises(UsageError, match="shape"):
        plots.convergence_figure(t, D[:-1])


def test_host_msd_figure_one_line_per_species(run_results):
    _, _, _, host = run_results
    fig = plots.host_msd_figure(host, threshold_A2=0.5)
    for s, c in host.items():
        x, y = _line(fig, f"host-msd-{s}")
        np.testing.assert_array_equal(x, c.lag_ps)
        np.testing.assert_array_equal(y, c.msd_A2)
    _, yl = _line(fig, "host-limit")
    assert yl[0] == 0.5
    with pytest.raises(UsageError):
        plots.host_msd_figure({})


# --------------------------------------------------------------------------- Arrhenius
def test_arrhenius_figure_line_band_bounds_and_target(fit_with_bound):
    fit, bound_T, bound_D = fit_with_bound
    fig = plots.arrhenius_figure(fit, target_K=300.0)
    ax = fig.axes[0]
    assert "1000 / T" in ax.get_xlabel() and "ln(D" in ax.get_ylabel()
    # data points: the temperatures and ln D as fitted
    x, y = _line(fig, "data")
    np.testing.assert_allclose(x, 1000.0 / fit.temperatures_K)
    np.testing.assert_allclose(y, fit.ln_values)
    # the fitted line: slope of ln D against 1000/T is -Ea / (1000 k_B) (Arrhenius, CODATA k_B)
    xl, yl = _line(fig, "fit-line")
    slope = np.polyfit(xl, yl, 1)[0]
    assert slope == pytest.approx(-fit.Ea_eV / (1000.0 * K_B_EV), rel=1e-9)
    assert xl.min() == pytest.approx(1000.0 / fit.fitted_range_K[1])
    assert xl.max() == pytest.approx(1000.0 / fit.fitted_range_K[0])
    xe, ye = _line(fig, "fit-line-extrapolated")
    assert xe.max() == pytest.approx(1000.0 / 300.0)
    # the 95% band reaches 300 K and spans the reported interval there
    (band,) = _by_gid(fig, "fit-band")
    assert isinstance(band, PolyCollection)
    v = band.get_paths()[0].vertices
    at300 = v[np.isclose(v[:, 0], 1000.0 / 300.0)]
    p = fit.extrapolate(300.0)
    assert at300[:, 1].min() == pytest.approx(math.log(p.interval95[0]), rel=1e-9)
    assert at300[:, 1].max() == pytest.approx(math.log(p.interval95[1]), rel=1e-9)
    xt, yt = _line(fig, "target")
    assert xt[0] == pytest.approx(1000.0 / 300.0) and yt[0] == pytest.approx(math.log(p.value))
    # the no-hop temperature sits at its bound as a downward triangle
    xb, yb = _line(fig, "upper-bounds")
    (ub,) = _by_gid(fig, "upper-bounds")
    assert ub.get_marker() == "v"
    assert xb[0] == pytest.approx(1000.0 / bound_T) and yb[0] == pytest.approx(math.log(bound_D))
    # this bound lies below the fitted line's band: the fit flags a conflict, the plot rings it
    assert fit.upper_bound_conflict
    xr, yr = _line(fig, "upper-bound-conflicts")
    assert xr[0] == pytest.approx(xb[0]) and yr[0] == pytest.approx(yb[0])


def test_arrhenius_secondary_axis_is_temperature(fit_with_bound):
    fit, _, _ = fit_with_bound
    fig = plots.arrhenius_figure(fit)
    _draw(fig)
    ax = fig.axes[0]
    tops = [c for c in ax.get_children() if c.__class__.__name__ == "SecondaryAxis"]
    assert len(tops) == 1
    top = tops[0]
    assert "temperature (K)" in top.get_xlabel()
    ticks = top.get_xticks()
    assert 300 in ticks
    for T in ticks:      # a tick at T on top sits above 1000/T at the bottom
        px_top = top.transData.transform((T, 0))[0]
        px_bottom = ax.transData.transform((1000.0 / T, 0))[0]
        assert px_top == pytest.approx(px_bottom, abs=0.01)
    # another target temperature gets its own tick
    other = plots.arrhenius_figure(fit, target_K=330.0)
    _draw(other)
    top = [c for c in other.axes[0].get_children() if c.__class__.__name__ == "SecondaryAxis"][0]
    assert 330.0 in top.get_xticks()


def test_arrhenius_figure_of_sigma_T_is_log10_sigma():
    T = np.array([600.0, 800.0, 1000.0])
    sigma = 50.0 * np.exp(-0.3 / (K_B_EV * T)) / T        # S/cm
    fit = diffkit.fit_arrhenius(T, sigma * T, 0.05 * sigma * T, quantity="sigma_T")
    fig = plots.arrhenius_figure(fit)
    assert "log₁₀(σ" in fig.axes[0].get_ylabel()
    x, y = _line(fig, "data")
    np.testing.assert_allclose(y, np.log10(sigma), rtol=1e-9)
    xl, yl = _line(fig, "fit-line")
    slope = np.polyfit(xl, yl, 1)[0]        # log10 σ + log10 T is linear in 1/T
    assert slope < 0


def test_arrhenius_figure_from_a_candidate_summary_and_without_fit(fit_with_bound):
    T = [600.0, 800.0, 1000.0]
    D = [1e-6, 5e-6, 1.2e-5]
    s = diffkit.summarize_candidate("X", T, D, [0.05 * d for d in D], n_ions=20,
                                    volumes_A3=2000.0, species="Li")
    fig = plots.arrhenius_figure(s)
    np.testing.assert_allclose(_line(fig, "data")[1], s.fit.ln_values)
    assert "X" in fig.axes[0].get_title(loc="left")
    # the dict form (as stored in campaign JSON) draws the same line, band and target
    from_dict = plots.arrhenius_figure(s.to_dict())
    for gid in ("data", "fit-line", "fit-line-extrapolated", "target"):
        np.testing.assert_allclose(_line(from_dict, gid)[1], _line(fig, gid)[1], rtol=1e-12)
    empty = plots.arrhenius_figure(None)
    assert "no Arrhenius fit" in " ".join(t.get_text() for t in empty.axes[0].texts)


def test_arrhenius_overview_one_series_per_candidate(fit_with_bound):
    fit, _, _ = fit_with_bound
    T = np.array([600.0, 800.0, 1000.0])
    other = diffkit.fit_arrhenius(T, 1e-3 * np.exp(-0.4 / (K_B_EV * T)),
                                  3e-5 * np.exp(-0.4 / (K_B_EV * T)))
    fig = plots.arrhenius_overview_figure({"a": fit, "b": other, "none": None})
    for i, f in enumerate((fit, other)):
        x, y = _line(fig, f"data-{i}")
        np.testing.assert_allclose(y, f.ln_values)
    a = [x for x in _by_gid(fig, "data-0") if hasattr(x, "get_marker")][0]
    b = [x for x in _by_gid(fig, "data-1") if hasattr(x, "get_marker")][0]
    assert a.get_marker() != b.get_marker()
    assert len(fig.axes[0].get_legend().get_texts()) == 2


# --------------------------------------------------------------------------- look
def _lightness(color):
    # CIE 1976 L* of an sRGB colour (IEC 61966-2-1 linearisation, D65 luminance weights)
    lin = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in to_rgb(color)]
    Y = 0.2126 * lin[0] + 0.7152 * lin[1] + 0.0722 * lin[2]
    return 116.0 * Y ** (1 / 3) - 16.0 if Y > (6 / 29) ** 3 else Y * (29 / 3) ** 3


def test_series_are_distinct_in_greyscale_and_without_colour():
    L = sorted(_lightness(s["color"]) for s in plots.SERIES_STYLES)
    assert min(np.diff(L)) >= 12.0                     # tell apart once printed in grey
    assert len({s["linestyle"] for s in plots.SERIES_STYLES}) == len(plots.SERIES_STYLES)
    assert len({s["marker"] for s in plots.SERIES_STYLES}) == len(plots.SERIES_STYLES)
    # candidates beyond four (overview plot) still get distinct colour-marker-line triples
    triples = {(st["color"], st["marker"], st["linestyle"])
               for st in (plots._style(i) for i in range(8))}
    assert len(triples) == 8
    # no pure red/green pair: every series colour has a blue component or is an orange
    for s in plots.SERIES_STYLES:
        r, g, b = to_rgb(s["color"])
        assert not (g > r + 0.2 and g > b + 0.2)       # nothing predominantly green


def test_figures_do_not_touch_pyplot_state(run_results):
    import sys

    curve, est, hops, host = run_results
    plots.msd_figure(curve, est)
    plots.hop_figure(hops)
    if "matplotlib.pyplot" in sys.modules:
        import matplotlib.pyplot as plt

        assert plt.get_fignums() == []


# --------------------------------------------------------------------------- files
def test_save_figure_writes_png_svg_pdf_atomically(tmp_path, run_results):
    curve, est, _, _ = run_results
    fig = plots.msd_figure(curve, est)
    written = plots.save_figure(fig, tmp_path / "msd.png", dpi=100)
    assert [os.path.basename(p) for p in written] == ["msd.png", "msd.svg", "msd.pdf"]
    png, svg, pdf = (open(p, "rb").read() for p in written)
    assert png[:8] == b"\x89PNG\r\n\x1a\n"          # ISO/IEC 15948 signature
    assert pdf[:5] == b"%PDF-"                      # ISO 32000-1 header
    assert b"<svg" in svg[:2000]
    img = imread(written[0])
    w_in, h_in = fig.get_size_inches()
    assert img.shape[:2] == (round(h_in * 100), round(w_in * 100))
    assert sorted(os.listdir(tmp_path)) == ["msd.pdf", "msd.png", "msd.svg"]   # no leftovers
    # same figure, same bytes (no time stamps)
    for fmt in ("png", "svg", "pdf"):
        assert plots.figure_bytes(fig, fmt, dpi=100) == plots.figure_bytes(fig, fmt, dpi=100)


def test_save_figure_failure_leaves_nothing(tmp_path, run_results, monkeypatch):
    curve, est, _, _ = run_results
    fig = plots.msd_figure(curve, est)
    with pytest.raises(UsageError, match="format"):
        plots.save_figure(fig, tmp_path / "x", formats=("png", "gif"))
    assert os.listdir(tmp_path) == []
    (tmp_path / "keep.png").write_bytes(b"old")

    def broken(*a, **k):
        raise OSError("disk full")

    monkeypatch.setattr(plots, "open", broken, raising=False)
    with pytest.raises(OSError):
        plots.save_figure(fig, tmp_path / "keep", formats=("png",))
    assert (tmp_path / "keep.png").read_bytes() == b"old"
    assert os.listdir(tmp_path) == ["keep.png"]
