"""A self-contained HTML report of a campaign (or of one candidate).

The report is one file: figures are embedded as base64 PNG (or SVG) images,
the style sheet is inline, there is no script and nothing is loaded from the
network (a Content-Security-Policy in the page forbids it). Every string that
comes from the user or from a file — candidate names, run labels, paths,
messages — is escaped.

Input is plain data, filled by whoever ran the analysis (``diffkit campaign``,
``diffkit arrhenius``, a notebook)::

    report = CampaignReport(
        title="Screening of lithium thiophosphates",
        candidates=[CandidateSection(
            name="candidate A", summary=candidate_summary,
            runs=[RunSection(label="600 K", temperature_K=600, msd=curve,
                             diffusion=estimate, hops=hop_summary,
                             assessment=assessment, provenance=traj.provenance)])])
    write_report("report.html", report)

Results may be the result objects or their ``to_dict()`` forms. Nothing here
computes physics: numbers are formatted, figures drawn by
:mod:`diffkit.report.plots`. A run's standard figures can also be drawn ahead
of time, elsewhere (:func:`render_run_images`; campaigns do it in the worker
that analysed the run) and handed in as ``RunSection(images=...)``; so can a
candidate's Arrhenius plot (:func:`render_candidate_images`,
``CandidateSection(images=...)``): the page is then the same, without drawing
them again.
"""

from __future__ import annotations

import base64
import html
import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone

from ..errors import UsageError
from ..io.atomic import atomic_write
from ..units import MS_PER_S
from . import plots

__all__ = ["RunSection", "CandidateSection", "CampaignReport", "render_report", "write_report",
           "render_run_images", "render_candidate_images", "REPORT_CAUTIONS"]

#: The plain-words cautions every report states in its summary.
REPORT_CAUTIONS = (
    "Computed values are screening estimates; they defer to measurement.",
    "Extrapolation to the target temperature assumes one conduction mechanism and no phase "
    "change between the simulated temperatures and the target.",
    "Making and handling candidate materials (many are air- or moisture-sensitive, some "
    "release toxic gases) follows local safety rules and licensed practice.",
)


# =========================================================================== input data
@dataclass(frozen=True)
class RunSection:
    """One simulation run of a candidate, as the report shows it.

    Attributes
    ----------
    label : str
        Short name of the run (e.g. "900 K" or a file name).
    temperature_K : float or None
    diffusion : DiffusionEstimate or dict, optional
        Falls back to ``assessment.diffusion`` when not given.
    msd : MSDCurve or dict, optional
        The mobile species' MSD (for the MSD and per-axis figures).
    hops : HopSummary or dict, optional
        Falls back to ``assessment.hops``.
    assessment : RunAssessment or dict, optional
        Verdict, checks and advice (:func:`diffkit.trust.assess_run`).
    host_msd : mapping of str to MSDCurve (or dicts)
        MSD of each host species, for the stability figure.
    host_limit_A2 : float, Å², optional
        Limit drawn on the host figure.
    running : object or dict, optional
        Running estimate of D against simulated time with ``times_ps``,
        ``D_cm2_per_s``, ``lower_cm2_per_s``, ``upper_cm2_per_s`` (falls back to
        the assessment's ``running`` or ``convergence`` field).
    facts : mapping
        Facts of the run (e.g. :func:`diffkit.report.tables.run_overview`).
    provenance : mapping
        Files, hashes, versions and options (e.g. ``Trajectory.provenance``).
    figures : sequence of (caption, matplotlib Figure)
        Further figures to show with the run.
    failure : str
        For a run that could not be analysed: its one-line reason.
    images : sequence of mapping, optional
        The run's standard figures already drawn and encoded by
        :func:`render_run_images` (for instance in the worker process that
        analysed the run, and cached beside its run file). They are embedded
        as they are when they were made in the report's image format and
        resolution; otherwise, or when None, the figures are drawn here.
    """

    label: str
    temperature_K: float | None = None
    diffusion: object = None
    msd: object = None
    hops: object = None
    assessment: object = None
    host_msd: Mapping = field(default_factory=dict)
    host_limit_A2: float | None = None
    running: object = None
    facts: Mapping = field(default_factory=dict)
    provenance: Mapping = field(default_factory=dict)
    figures: tuple = ()
    failure: str = ""
    images: tuple | None = None


@dataclass(frozen=True)
class CandidateSection:
    """One candidate material: its summary over temperatures and its runs.

    Attributes
    ----------
    name : str
    summary : CandidateSummary or dict, optional
        From :func:`diffkit.summarize_candidate`; None when there is none.
    runs : sequence of RunSection
    notes : sequence of str
        Further plain-words remarks (e.g. a failed run, from the campaign).
    images : sequence of mapping, optional
        The candidate's figures (its Arrhenius plot) already drawn and encoded
        by :func:`render_candidate_images` from the same summary; embedded as
        they are when made in the report's image format and resolution,
        otherwise (or when None) drawn here.
    """

    name: str
    summary: object = None
    runs: tuple = ()
    notes: tuple = ()
    images: tuple | None = None


@dataclass(frozen=True)
class CampaignReport:
    """Everything one report shows.

    Attributes
    ----------
    title : str
    candidates : sequence of CandidateSection
        In the order of the summary table (rank them before, if wanted).
    settings : mapping
        Campaign-wide options (target temperature, tiers, thresholds...).
    provenance : mapping
        Manifest, versions, hosts... anything that says where the report comes from.
    created_utc : str, optional
        Time stamp shown in the header; default now.
    introduction : str
        A sentence or two shown under the title.
    """

    title: str
    candidates: tuple = ()
    settings: Mapping = field(default_factory=dict)
    provenance: Mapping = field(default_factory=dict)
    created_utc: str | None = None
    introduction: str = ""


# =========================================================================== small helpers
def _e(text):
    """Escape any value for HTML text or attribute context."""
    return html.escape("" if text is None else str(text), quote=True)


def _get(obj, name, default=None):
    if obj is None:
        return default
    if isinstance(obj, Mapping):
        return obj.get(name, default)
    return getattr(obj, name, default)


def _first(obj, names, default=None):
    for n in names:
        v = _get(obj, n)
        if v is not None:
            return v
    return default


def _num(v):
    try:
        f = float(v)
    except (TypeError, ValueError):
        return math.nan
    return f


_SUP = str.maketrans("-0123456789", "−0123456789")


def _exponent(v, digits):
    """Decimal exponent of v after rounding to ``digits`` significant digits."""
    exp = int(math.floor(math.log10(abs(v))))
    if abs(round(v / 10.0 ** exp, digits - 1)) >= 10.0:
        exp += 1
    return exp


def _sci(v, digits=3):
    """A number for HTML: plain for ordinary sizes, a × 10^n form otherwise."""
    v = _num(v)
    if not math.isfinite(v):
        return "—"
    if v == 0:
        return "0"
    exp = _exponent(v, digits)
    if -3 <= exp <= 4:
        text = f"{v:.0f}" if exp >= digits else f"{v:.{digits}g}"
        return text.replace("-", "−")
    mant = v / 10 ** exp
    text = f"{mant:.{digits - 1}f} × 10<sup>{str(exp).translate(_SUP)}</sup>"
    return text.replace("-", "−", 1)


def _sci_pm(v, se, digits=3):
    """'(3.81 ± 0.08) × 10⁻⁵' in HTML (shared exponent)."""
    v, se = _num(v), _num(se)
    if not math.isfinite(v):
        return "—"
    if not math.isfinite(se):
        return _sci(v, digits)
    if v == 0:
        return f"0 ± {_sci(se, 2)}"
    exp = _exponent(v, digits)
    if -3 <= exp <= 4:
        if exp >= digits:
            return f"{v:.0f} ± {se:.0f}".replace("-", "−")
        return f"{v:.{digits}g} ± {se:.2g}".replace("-", "−")
    f = 10.0 ** exp
    dec = digits - 1
    return (f"({v / f:.{dec}f} ± {se / f:.{dec}f}) × 10<sup>{str(exp).translate(_SUP)}</sup>"
            .replace("-", "−", 1))


def _interval(pair, digits=3):
    if pair is None:
        return "—"
    try:
        lo, hi = (_num(v) for v in pair)
    except (TypeError, ValueError):
        return "—"
    if not (math.isfinite(lo) or math.isfinite(hi)):
        return "—"
    hi_text = "∞" if hi == math.inf else _sci(hi, digits)
    return f"{_sci(lo, digits)} – {hi_text}"


def _fmt_T(T):
    T = _num(T)
    return "—" if not math.isfinite(T) else f"{T:g} K"


def _verdict_rank(verdict):
    """0 good, 1 middling, 2 bad, None unknown — for the badge colour only (text is shown)."""
    if not verdict:
        return None
    try:
        from .. import trust

        order = getattr(trust, "VERDICTS", None)
        if order and verdict in order:
            i = list(order).index(verdict)
            return 0 if i == 0 else (2 if i == len(order) - 1 else 1)
    except ImportError:  # pragma: no cover - trust.py not there yet
        pass
    v = str(verdict).lower()
    if any(w in v for w in ("unreliable", "fail", "not ", "reject", "untrust", "insufficient")):
        return 2
    if any(w in v for w in ("caution", "marginal", "bound", "partial", "weak", "limited")):
        return 1
    if any(w in v for w in ("reliable", "trust", "good", "ok", "pass", "sound", "converged")):
        return 0
    return None


def _badge(text, rank=None, *, kind="verdict"):
    cls = {0: "good", 1: "fair", 2: "poor"}.get(rank, "neutral")
    return f'<span class="badge {kind} {cls}">{_e(text)}</span>'


def _tier_badge(tier):
    if not tier:
        return "—"
    t = str(tier)
    cls = {"fast": "good", "moderate": "fair", "slow": "poor"}.get(t, "neutral")
    return f'<span class="badge tier {cls}">{_e(t)}</span>'


# =========================================================================== figures
_BASE64 = re.compile(r"[A-Za-z0-9+/]+={0,2}")


class _FigureEncoder:
    def __init__(self, image_format, dpi):
        if image_format not in ("png", "svg"):
            raise UsageError(f"image_format must be 'png' or 'svg', got {image_format!r}")
        self.fmt = image_format
        self.dpi = float(dpi)
        self.count = 0
        self.run_figures = True

    def encode(self, fig, caption, alt):
        """One figure as an image record (plain data, see :func:`render_run_images`)."""
        data = plots.figure_bytes(fig, self.fmt, dpi=self.dpi)
        w_in, h_in = fig.get_size_inches()
        return {"format": self.fmt, "dpi": self.dpi, "caption": caption, "alt": alt,
                "width": int(round(w_in * self.dpi)), "height": int(round(h_in * self.dpi)),
                "data_base64": base64.b64encode(data).decode("ascii")}

    def failed(self, error):
        """The record of a figure that could not be drawn."""
        return {"format": self.fmt, "dpi": self.dpi, "error": str(error)}

    def accepts(self, images):
        """True when pre-rendered ``images`` were made in this report's format and resolution."""
        try:
            return all(isinstance(im, Mapping) and im.get("format") == self.fmt
                       and float(im.get("dpi")) == self.dpi
                       and ("error" in im or _BASE64.fullmatch(im.get("data_base64") or ""))
                       for im in images)
        except (TypeError, ValueError):
            return False

    def embed(self, image):
        """The HTML of one image record."""
        if "error" in image:
            return f'<p class="failure">{_e(image["error"])}</p>'
        mime = "image/png" if image["format"] == "png" else "image/svg+xml"
        self.count += 1
        return (f'<figure class="plot"><img src="data:{mime};base64,{image["data_base64"]}" '
                f'alt="{_e(image["alt"])}" width="{int(image["width"])}" '
                f'height="{int(image["height"])}" loading="eager">'
                f'<figcaption>{image["caption"]}</figcaption></figure>')

    def html(self, fig, caption, alt):
        return self.embed(self.encode(fig, caption, alt))


def _try_figure(make, *args, **kwargs):
    """Draw a figure; a drawing problem becomes a note in the report, not a crash."""
    try:
        return make(*args, **kwargs), None
    except Exception as exc:  # noqa: BLE001 - a report must still be written
        return None, f"figure not drawn: {type(exc).__name__}: {exc}"


# =========================================================================== generic tables
def _kv_table(rows, cls="facts"):
    body = "".join(f"<tr><th scope=\"row\">{k}</th><td>{v}</td></tr>" for k, v in rows
                   if v not in (None, ""))
    return f'<table class="{cls}"><tbody>{body}</tbody></table>' if body else ""


def _plain(value, depth=0):
    """Any JSON-like value as escaped HTML (dicts as nested tables)."""
    if isinstance(value, Mapping):
        if not value:
            return '<span class="muted">none</span>'
        if depth > 3:
            return f"<code>{_e(value)}</code>"
        rows = "".join(f'<tr><th scope="row">{_e(k)}</th><td>{_plain(v, depth + 1)}</td></tr>'
                       for k, v in value.items())
        return f'<table class="prov"><tbody>{rows}</tbody></table>'
    if isinstance(value, (list, tuple)):
        if not value:
            return '<span class="muted">none</span>'
        if all(isinstance(v, Mapping) for v in value):
            keys = []
            for v in value:
                keys += [k for k in v if k not in keys]
            head = "".join(f"<th>{_e(k)}</th>" for k in keys)
            rows = "".join("<tr>" + "".join(f"<td>{_plain(v.get(k), depth + 1)}</td>"
                                            for k in keys) + "</tr>" for v in value)
            return (f'<table class="prov list"><thead><tr>{head}</tr></thead>'
                    f"<tbody>{rows}</tbody></table>")
        return "<br>".join(_plain(v, depth + 1) for v in value)
    if isinstance(value, float):
        return _e(f"{value:.6g}")
    text = "" if value is None else str(value)
    if len(text) >= 32 and " " not in text:     # hashes, paths
        return f"<code>{_e(text)}</code>"
    return _e(text)


# =========================================================================== summary
def _run_verdicts(cand):
    """One line per run: its label and verdict (or what is known without an assessment)."""
    out = []
    for r in cand.runs:
        if r.failure:
            out.append(f'<li>{_e(r.label)}: {_badge("failed", 2)}</li>')
            continue
        v = _get(r.assessment, "verdict")
        if v is not None:
            out.append(f"<li>{_e(r.label)}: {_badge(v, _verdict_rank(v))}</li>")
            continue
        d = _diffusion_of(r)
        if d is not None and _get(d, "is_upper_bound"):
            out.append(f'<li>{_e(r.label)}: {_badge("upper bound only", 1)}</li>')
        elif d is not None and not math.isfinite(_num(_get(d, "D_cm2_per_s"))):
            out.append(f'<li>{_e(r.label)}: {_badge("no value", 2)}</li>')
        else:
            out.append(f"<li>{_e(r.label)}</li>")
    return f'<ul class="verdicts">{"".join(out)}</ul>' if out else '<span class="muted">—</span>'


def _sigma_cells(s):
    val = _get(s, "sigma_target_mS_per_cm")
    band = _get(s, "sigma_target_interval95_mS_per_cm")
    if val is None:
        return '<td class="num">—</td><td class="num">—</td>'
    if _get(s, "sigma_target_is_upper_bound"):
        return f'<td class="num">&lt; {_sci(val)}</td><td class="num">upper bound</td>'
    return f'<td class="num">{_sci(val)}</td><td class="num">{_interval(band)}</td>'


def _ea_cell(s):
    Ea = _get(s, "Ea_eV")
    if Ea is None:
        return '<td class="num">—</td>'
    return f'<td class="num">{_num(Ea):.3f} ± {_num(_get(s, "Ea_stderr_eV")):.3f}</td>'


def _summary_table(report):
    targets = {_num(_get(c.summary, "target_temperature_K")) for c in report.candidates
               if c.summary is not None}
    targets = {t for t in targets if math.isfinite(t)}
    T_text = f"{next(iter(targets)):g} K" if len(targets) == 1 else "target T"
    head = ("<tr><th>#</th><th>Candidate</th><th>E<sub>a</sub> (eV)</th>"
            f"<th>σ({T_text}) (mS/cm)</th><th>95% band (mS/cm)</th><th>Tier</th>"
            "<th>Runs and verdicts</th><th>Flags</th></tr>")
    rows = []
    for i, c in enumerate(report.candidates, 1):
        s = c.summary
        flags = list(_get(s, "flags", ()) or ())
        flag_html = ("".join(f'<span class="chip">{_e(f)}</span>' for f in flags)
                     or '<span class="muted">none</span>')
        rows.append(
            f'<tr><td class="num">{i}</td>'
            f'<td class="name"><a href="#cand-{i}">{_e(c.name)}</a></td>'
            f"{_ea_cell(s)}{_sigma_cells(s)}<td>{_tier_badge(_get(s, 'tier'))}</td>"
            f"<td>{_run_verdicts(c)}</td><td>{flag_html}</td></tr>")
    return (f'<table class="summary" id="summary-table"><thead>{head}</thead>'
            f'<tbody>{"".join(rows)}</tbody></table>')


def _cautions_box(cautions):
    items = "".join(f"<li>{_e(c)}</li>" for c in cautions)
    return (f'<aside class="cautions" id="cautions"><h3>Read before using these numbers</h3>'
            f"<ul>{items}</ul></aside>")


def _tiers_text(report):
    for c in report.candidates:
        tiers = _get(c.summary, "tiers")
        if tiers is not None:
            b = list(_get(tiers, "boundaries_S_per_cm", ()) or ())
            names = list(_get(tiers, "names", ()) or ())
            if b and len(names) == len(b) + 1:
                parts = [f"{_e(names[0])} below {_sci(b[0] * MS_PER_S)} mS/cm"]
                for j in range(1, len(b)):
                    parts.append(f"{_e(names[j])} {_sci(b[j - 1] * MS_PER_S)}–"
                                 f"{_sci(b[j] * MS_PER_S)} mS/cm")
                parts.append(f"{_e(names[-1])} from {_sci(b[-1] * MS_PER_S)} mS/cm")
                return ("Tiers by σ at the target temperature: " + "; ".join(parts)
                        + "; <em>unresolved</em> when the 95% band spans more than one tier.")
    return ""


# =========================================================================== candidate
def _diffusion_of(run):
    return run.diffusion if run.diffusion is not None else _get(run.assessment, "diffusion")


def _hops_of(run):
    return run.hops if run.hops is not None else _get(run.assessment, "hops")


def _running_of(run):
    if run.running is not None:
        return run.running
    return _first(run.assessment, ("running", "convergence", "running_estimate"))


def _candidate_facts(s):
    if s is None:
        return '<p class="muted">No summary over temperatures for this candidate.</p>'
    T0 = _num(_get(s, "target_temperature_K"))
    rows = []
    if _get(s, "Ea_eV") is not None:
        rows.append(("Activation energy E<sub>a</sub>",
                     f"{_num(_get(s, 'Ea_eV')):.4f} ± {_num(_get(s, 'Ea_stderr_eV')):.4f} eV "
                     f"(95%: {_interval(_get(s, 'Ea_interval95_eV'), 4)} eV)"))
    fit = _get(s, "fit")
    if fit is not None and _get(fit, "prefactor") is not None:
        unit = "cm²/s" if _get(fit, "quantity", "D") == "D" else "S·K/cm"
        sym = "D<sub>0</sub>" if unit == "cm²/s" else "(σT)<sub>0</sub>"
        rows.append((f"Prefactor {sym}", f"{_sci(_get(fit, 'prefactor'))} {unit} "
                     f"(95%: {_interval(_get(fit, 'prefactor_interval95'))} {unit})"))
    val = _get(s, "sigma_target_mS_per_cm")
    if val is not None:
        if _get(s, "sigma_target_is_upper_bound"):
            txt = f"&lt; {_sci(val)} mS/cm (95% upper bound)"
        else:
            band = _interval(_get(s, "sigma_target_interval95_mS_per_cm"))
            txt = f"{_sci(val)} mS/cm (95% band {band} mS/cm)"
        rows.append((f"σ({T0:g} K)", txt))
    else:
        rows.append((f"σ({T0:g} K)", '<span class="muted">no value</span>'))
    rows.append(("Screening tier", _tier_badge(_get(s, "tier"))))
    rows.append(("How σ was obtained", _e(_get(s, "route_description"))))
    rows.append(("Haven ratio, charge, ions",
                 f"H<sub>R</sub> = {_num(_get(s, 'haven_ratio')):g}; "
                 f"z = {_num(_get(s, 'charge')):+g}; "
                 f"{_num(_get(s, 'n_ions')):g} mobile ions in the cell"))
    if _get(s, "volume_note"):
        rows.append(("Volume at the target", _e(_get(s, "volume_note"))))
    if _get(s, "statistics"):
        rows.append(("Statistics of the fit", _e(_get(s, "statistics"))))
    if fit is not None and math.isfinite(_num(_get(fit, "chi2_reduced"))):
        rows.append(("χ²/dof of the fit", f"{_num(_get(fit, 'chi2_reduced')):.2f} "
                     f"({_e(_get(fit, 'dof'))} degrees of freedom)"))
    return _kv_table(rows)


def _sigma_table(s):
    per_T = list(_get(s, "sigma_at_temperatures", ()) or ())
    if not per_T:
        return ""
    coll = {_num(_get(c, "temperature_K")): c
            for c in (_get(s, "sigma_collective_at_temperatures", ()) or ())}
    rows = []
    for c in sorted(per_T, key=lambda c: _num(_get(c, "temperature_K"))):
        T = _num(_get(c, "temperature_K"))
        cc = coll.get(T)
        coll_txt = ("—" if cc is None else
                    _sci_pm(_get(cc, "sigma_mS_per_cm"), _get(cc, "sigma_stderr_mS_per_cm")))
        D_txt = _sci_pm(_get(c, "D_cm2_per_s"), _get(c, "D_stderr_cm2_per_s"))
        s_txt = _sci_pm(_get(c, "sigma_mS_per_cm"), _get(c, "sigma_stderr_mS_per_cm"))
        rows.append(f'<tr><td class="num">{T:g}</td><td class="num">{D_txt}</td>'
                    f'<td class="num">{s_txt}</td><td class="num">{coll_txt}</td></tr>')
    return ('<h3>Conductivity at the simulated temperatures</h3>'
            '<table class="data"><thead><tr><th>T (K)</th><th>tracer D (cm²/s)</th>'
            "<th>σ from tracer D (mS/cm)</th><th>σ from collective D (mS/cm)</th></tr></thead>"
            f'<tbody>{"".join(rows)}</tbody></table>'
            '<p class="note">± one standard error. The tracer route divides by the Haven ratio '
            "stated above; the collective route needs none but has a larger error bar.</p>")


def _messages(items, cls="messages"):
    items = [m for m in items if m]
    if not items:
        return ""
    return f'<ul class="{cls}">' + "".join(f"<li>{_e(m)}</li>" for m in items) + "</ul>"


# =========================================================================== run
def _run_facts(run, d, h):
    rows = [("Temperature", _fmt_T(run.temperature_K if run.temperature_K is not None
                                   else _get(d, "temperature_K")))]
    f = run.facts or {}
    if f:
        if f.get("duration_ps") is not None:
            dt = _num(f.get("frame_interval_ps"))
            every = f" every {dt:.4g} ps" if math.isfinite(dt) else ""
            rows.append(("Simulated time", f"{_num(f['duration_ps']):g} ps "
                         f"({_e(f.get('n_frames'))} frames{every})"))
        if f.get("atoms_per_species"):
            counts = ", ".join(f"{k} {v}" for k, v in f["atoms_per_species"].items())
            rows.append(("Atoms", _e(counts)))
        if f.get("volume_mean_A3") is not None:
            rows.append(("Mean cell volume", f"{_num(f['volume_mean_A3']):.1f} Å³"))
    if d is not None:
        sp = _get(d, "species", ())
        sp = sp if isinstance(sp, str) else "+".join(sp or ())
        D = _num(_get(d, "D_cm2_per_s"))
        if _get(d, "is_upper_bound"):
            rows.append((f"Tracer D of {_e(sp)}",
                         f"&lt; {_sci(D)} cm²/s (one-sided 95% upper bound)"))
        elif math.isfinite(D):
            rows.append((f"Tracer D of {_e(sp)}",
                         f"{_sci_pm(D, _get(d, 'D_stderr_cm2_per_s'))} cm²/s "
                         f"(95%: {_interval(_get(d, 'D_interval95_cm2_per_s'))} cm²/s)"))
        else:
            rows.append((f"Tracer D of {_e(sp)}", '<span class="muted">no value</span>'))
        Ds = _num(_get(d, "D_sigma_cm2_per_s"))
        if math.isfinite(Ds):
            pre = "&lt; " if _get(d, "D_sigma_is_upper_bound") else ""
            rows.append(("Collective D<sub>σ</sub>",
                         f"{pre}{_sci_pm(Ds, _get(d, 'D_sigma_stderr_cm2_per_s'))} cm²/s "
                         f"(95%: {_interval(_get(d, 'D_sigma_interval95_cm2_per_s'))} cm²/s)"))
        w = _get(d, "fit_window_ps")
        if w is not None and all(math.isfinite(_num(v)) for v in w):
            rows.append(("Fit window", f"{_num(w[0]):.3g}–{_num(w[1]):.3g} ps "
                         f"({_e(_get(d, 'window_chosen_by', ''))}; "
                         f"{_e(_get(d, 'n_fit_lags'))} lags)"))
        rows.append(("Estimator · error from",
                     f"{_e(_get(d, 'method'))} · {_e(_get(d, 'error_source'))}"))
        rows.append(("Drift reference", _e(_get(d, "reference"))))
        if _get(d, "dimensionality"):
            rows.append(("Pattern of motion", _e(_get(d, "dimensionality"))))
    if h is not None:
        tot = _get(h, "total_hops")
        neff = _num(_get(h, "n_effective_hops"))
        frac = _num(_get(h, "fraction_ions_hopped"))
        a = _num(_get(h, "mean_jump_distance_A"))
        txt = f"{_e(tot)} hops"
        if math.isfinite(frac):
            txt += f" by {100 * frac:.0f}% of the ions"
        if math.isfinite(neff):
            txt += f"; effective hops {neff:.4g}"
        if math.isfinite(a):
            txt += f"; mean jump {a:.3g} Å"
        rows.append(("Hops", txt))
    a = run.assessment
    if a is not None:
        rel = _num(_get(a, "expected_relative_error"))
        if math.isfinite(rel):
            rows.append(("Expected relative error of D",
                         f"{100 * rel:.0f}% (from the effective hops)"))
        ext = _num(_get(a, "suggested_extension_ps"))
        if math.isfinite(ext):
            rows.append(("Suggested extension", f"{ext:.3g} ps more"))
        st = _num(_get(a, "suggested_start_ps"))
        if math.isfinite(st):
            rows.append(("Suggested start", f"drop the first {st:.3g} ps (not equilibrated)"))
        Tk = _num(_get(a, "kinetic_temperature_K"))
        if math.isfinite(Tk):
            rows.append(("Kinetic temperature", f"{Tk:.1f} K"))
    return _kv_table(rows)


_CHECK_NAME = ("title", "name", "label")
_CHECK_STATUS = ("status", "passed")
_CHECK_VALUE = ("figure", "value")
_CHECK_NEED = ("threshold", "limit")
_CHECK_TEXT = ("explanation", "message", "detail")
#: Badge class of a check status (diffkit.trust.CHECK_STATUSES); unknown ones stay neutral.
_STATUS_RANK = {"pass": 0, "warn": 1, "fail": 2, "skipped": None}


def _status_text(v):
    if isinstance(v, bool):
        return ("pass" if v else "fail"), (0 if v else 2)
    v = str(v)
    return v, _STATUS_RANK.get(v, _verdict_rank(v))


def _value_text(v):
    if isinstance(v, bool):
        return _e(v)
    if isinstance(v, (int, float)):
        return "n/a" if not math.isfinite(float(v)) else _sci(v, 4)
    if v is None:
        return "n/a"
    if isinstance(v, (list, tuple)) and all(isinstance(x, (int, float)) for x in v):
        return ", ".join(_sci(x, 4) for x in v)
    return _e(v)


def _checks_table(checks):
    if isinstance(checks, Mapping):
        checks = list(checks.values())
    checks = list(checks or ())
    if not checks:
        return ""
    rows = []
    for c in checks:
        if isinstance(c, str):
            rows.append(f'<tr><td colspan="4">{_e(c)}</td></tr>')
            continue
        name = _first(c, _CHECK_NAME, "check")
        st = _first(c, _CHECK_STATUS)
        st_html = "—" if st is None else _badge(*_status_text(st), kind="status")
        val = _first(c, _CHECK_VALUE)
        unit = _get(c, "unit") or ""
        shown = _value_text(val)
        fig = shown + (f' <span class="unit">{_e(unit)}</span>' if unit and shown != "n/a" else "")
        need = _first(c, _CHECK_NEED)
        need_html = "" if need in (None, "") else f'<div class="need">{_e(need)}</div>'
        text = _first(c, _CHECK_TEXT, "")
        adv = _get(c, "advice")
        adv_html = f'<div class="advice-line">→ {_e(adv)}</div>' if adv else ""
        rows.append(f"<tr><td>{_e(name)}</td><td>{st_html}</td>"
                    f'<td class="fig">{fig}{need_html}</td>'
                    f"<td>{_e(text)}{adv_html}</td></tr>")
    return ('<table class="checks"><thead><tr><th>Check</th><th>Result</th>'
            "<th>Figure and thresholds</th><th>What it means</th></tr></thead>"
            f'<tbody>{"".join(rows)}</tbody></table>')


def _advice(assessment):
    adv = _get(assessment, "advice")
    if not adv:
        return ""
    items = [adv] if isinstance(adv, str) else list(adv)
    lis = "".join(f"<li>{_e(a)}</li>" for a in items if a)
    return f'<div class="advice"><h5>Advice</h5><ol>{lis}</ol></div>' if lis else ""


def _run_figures(run, d, h):
    """The standard figures of one run: (figure or None, error, caption HTML, alt text)."""
    figs = []
    T = run.temperature_K
    tag = f"{run.label}" + (f", {T:g} K" if isinstance(T, (int, float)) else "")
    if run.msd is not None:
        fig, err = _try_figure(plots.msd_figure, run.msd, d)
        figs.append((fig, err, "Mean-squared displacement (log–log). Shaded: fit window; "
                     "dash-dot: fitted line; dotted: slope 1, where diffusion is normal.",
                     f"MSD of run {tag}"))
        fig, err = _try_figure(plots.axis_msd_figure, run.msd, d)
        figs.append((fig, err, "MSD along x, y and z: unequal slopes show anisotropic motion.",
                     f"per-axis MSD of run {tag}"))
    if h is not None and _get(h, "hops_per_ion") is not None:
        fig, err = _try_figure(plots.hop_figure, h)
        figs.append((fig, err, "Each tick is one hop of one ion; bars count the hops per ion. "
                     "Hops shared by many ions give an error bar that can be trusted.",
                     f"hops of run {tag}"))
    running = _running_of(run)
    if running is not None:
        fig, err = _try_figure(plots.convergence_figure, running=running, final=d)
        figs.append((fig, err, "D from the first part of the run against the length used: "
                     "a converged run settles inside the whole run's band.",
                     f"convergence of run {tag}"))
    if run.host_msd:
        fig, err = _try_figure(plots.host_msd_figure, run.host_msd,
                               threshold_A2=run.host_limit_A2)
        figs.append((fig, err, "MSD of the host species: a stable framework levels off; a "
                     "steady rise means melting or decomposition.", f"host MSD of run {tag}"))
    return figs


def _encode_run_figures(run, enc):
    out = []
    for fig, err, cap, alt in _run_figures(run, _diffusion_of(run), _hops_of(run)):
        out.append(enc.failed(err) if fig is None else enc.encode(fig, cap, alt))
    return out


def render_run_images(run, *, image_format="png", dpi=110):
    """Draw and encode the standard figures of one run, ready to embed later.

    What :func:`render_report` would draw for this run (MSD, per-axis MSD,
    hops, convergence, host MSD; same captions and order), done ahead of time
    — e.g. in the worker process that analysed the run — so that the report
    can embed them through ``RunSection(images=...)`` without drawing.

    Parameters
    ----------
    run : RunSection
    image_format : {"png", "svg"}
    dpi : float
        Resolution of PNG images (also sets the width and height attributes).

    Returns
    -------
    tuple of dict
        One JSON-ready record per figure: ``format``, ``dpi``, ``caption``
        (HTML), ``alt``, ``width`` and ``height`` (pixels) and ``data_base64``;
        or ``format``, ``dpi`` and ``error`` for a figure that could not be drawn.
    """
    if not isinstance(run, RunSection):
        raise UsageError(f"render_run_images needs a RunSection, got {type(run).__name__}")
    return tuple(_encode_run_figures(run, _FigureEncoder(image_format, dpi)))


def _run_section(run, enc, cand_index, run_index):
    anchor = f"cand-{cand_index}-run-{run_index}"
    d, h = _diffusion_of(run), _hops_of(run)
    verdict = _get(run.assessment, "verdict")
    head_badge = ""
    if run.failure:
        head_badge = _badge("failed", 2)
    elif verdict is not None:
        head_badge = _badge(verdict, _verdict_rank(verdict))
    T_txt = _fmt_T(run.temperature_K)
    extra = ("" if T_txt == "—" or T_txt in str(run.label)
             else f' <span class="muted">· {T_txt}</span>')
    parts = [f'<article class="run" id="{anchor}"><header class="run-head"><h4>{_e(run.label)}'
             f"{extra}</h4>{head_badge}</header>"]
    if run.failure:
        parts.append(f'<p class="failure">This run could not be analysed: {_e(run.failure)}</p>')
    summary_line = _first(run.assessment, ("headline", "summary_text", "summary", "message"))
    if isinstance(summary_line, str) and summary_line:
        parts.append(f'<p class="headline">{_e(summary_line)}</p>')
    parts.append(_advice(run.assessment))
    parts.append(_run_facts(run, d, h))
    parts.append(_checks_table(_get(run.assessment, "checks")))
    notes = []
    for src in (d, h):
        m = _get(src, "message")
        if m:
            notes += [x.strip() for x in str(m).split("; ") if x.strip()]
    if notes:
        parts.append('<details class="notes"><summary>Notes from the analysis</summary>'
                     + _messages(notes) + "</details>")
    if not enc.run_figures:
        images = []
    elif run.images is not None and enc.accepts(run.images):
        images = list(run.images)  # drawn before, e.g. by the worker that analysed the run
    else:
        images = _encode_run_figures(run, enc)
    cells = [enc.embed(im) for im in images]
    cells += [enc.html(fig, _e(cap), str(cap)) for cap, fig in run.figures]
    if cells:
        parts.append('<div class="figures">' + "".join(cells) + "</div>")
    if run.provenance:
        parts.append('<details class="prov"><summary>Provenance: files, hashes, versions, '
                     f"options</summary>{_plain(run.provenance)}</details>")
    parts.append("</article>")
    return "".join(p for p in parts if p)


def _encode_candidate_figures(cand, enc):
    """The candidate's figures as image records: its Arrhenius plot when it has a fit."""
    s = cand.summary
    if _get(s, "fit") is None:
        return []
    fig, err = _try_figure(plots.arrhenius_figure, s,
                           target_K=_num(_get(s, "target_temperature_K", 300.0)))
    if fig is None:
        return [enc.failed(err)]
    return [enc.encode(fig, "Arrhenius plot: simulated temperatures (±1 s.e.), the fitted line "
                       "and its 95% band carried to the target temperature; triangles mark "
                       "upper bounds where no hops were seen.", f"Arrhenius plot of {cand.name}")]


def render_candidate_images(cand, *, image_format="png", dpi=110):
    """Draw and encode a candidate's figures (its Arrhenius plot), ready to embed later.

    What :func:`render_report` would draw for the candidate, done ahead of
    time — e.g. while a campaign's other runs are still computing — so that the
    report can embed them through ``CandidateSection(images=...)``.

    Parameters
    ----------
    cand : CandidateSection
        Its ``summary`` is what is drawn (runs are not needed).
    image_format : {"png", "svg"}
    dpi : float
        Resolution of PNG images.

    Returns
    -------
    tuple of dict
        Image records as :func:`render_run_images` makes them; empty when the
        candidate has no Arrhenius fit.
    """
    if not isinstance(cand, CandidateSection):
        raise UsageError(f"render_candidate_images needs a CandidateSection, "
                         f"got {type(cand).__name__}")
    return tuple(_encode_candidate_figures(cand, _FigureEncoder(image_format, dpi)))


def _candidate_section(cand, i, enc):
    s = cand.summary
    parts = [f'<section class="candidate" id="cand-{i}"><header class="cand-head">'
             f'<h2><span class="rank">{i}</span> {_e(cand.name)}</h2>'
             f'{_tier_badge(_get(s, "tier")) if s is not None else ""}</header>']
    facts = _candidate_facts(s)
    if cand.images is not None and enc.accepts(cand.images):
        images = list(cand.images)  # drawn before, e.g. while the campaign's runs went on
    else:
        images = _encode_candidate_figures(cand, enc)
    arr = "".join(enc.embed(im) for im in images)
    parts.append(f'<div class="cand-top"><div>{facts}</div><div>{arr}</div></div>')
    flags = list(_get(s, "flags", ()) or ())
    if flags:
        parts.append('<p class="flags">Flags: ' + "".join(f'<span class="chip">{_e(f)}</span>'
                                                         for f in flags) + "</p>")
    msgs = list(_get(s, "messages", ()) or ()) + list(cand.notes or ())
    if msgs:
        parts.append("<h3>What the fit says</h3>" + _messages(msgs))
    parts.append(_sigma_table(s))
    cautions = list(_get(s, "cautions", ()) or ())
    if cautions:
        parts.append('<div class="cand-cautions"><h3>Cautions</h3>' + _messages(cautions)
                     + "</div>")
    if cand.runs:
        parts.append(f"<h3>Runs ({len(cand.runs)})</h3>")
        runs = sorted(enumerate(cand.runs, 1),
                      key=lambda ir: (_num(ir[1].temperature_K) if ir[1].temperature_K is not None
                                      else math.inf))
        for j, r in runs:
            parts.append(_run_section(r, enc, i, j))
    parts.append("</section>")
    return "".join(p for p in parts if p)


# =========================================================================== page
_CSS = """
:root{--ink:#1c2f5e;--mulberry:#9b2f66;--harbour:#3a8dc4;--amber:#e69b2e;--slate:#5b6472;
--rule:#d5d9e0;--paper:#ffffff;--wash:#f5f6f8;--text:#1d2330}
*{box-sizing:border-box}
html{font-size:15px}
body{margin:0;background:var(--wash);color:var(--text);line-height:1.5;
font-family:system-ui,-apple-system,"Segoe UI",Roboto,"Noto Sans","DejaVu Sans",Arial,sans-serif}
header.masthead{background:var(--ink);color:#fff;padding:28px 0 24px}
.wrap{max-width:1180px;margin:0 auto;padding:0 28px}
.masthead .kicker{text-transform:uppercase;letter-spacing:.12em;font-size:.75rem;opacity:.75;
margin:0}
.masthead h1{margin:4px 0 6px;font-size:1.75rem;font-weight:650;line-height:1.25;
word-break:break-word}
.masthead .meta{margin:0;font-size:.88rem;opacity:.85}
.masthead .intro{margin:10px 0 0;max-width:60em;opacity:.95}
main{padding:22px 0 40px}
section{background:var(--paper);border:1px solid var(--rule);border-radius:8px;padding:22px 26px;
margin:0 0 22px}
h2{font-size:1.3rem;margin:0 0 14px;color:var(--ink);word-break:break-word}
h3{font-size:1.02rem;margin:20px 0 8px;color:var(--ink)}
h4{font-size:1rem;margin:0;word-break:break-word}
h5{font-size:.9rem;margin:0 0 4px}
a{color:var(--ink)}
.muted{color:var(--slate)}
table{border-collapse:collapse;width:100%;font-size:.9rem}
th,td{padding:6px 9px;text-align:left;vertical-align:top;border-bottom:1px solid var(--rule)}
thead th{background:#eef1f5;color:#27304a;font-weight:600;border-bottom:2px solid #c4cad4;
white-space:nowrap}
td.num{font-variant-numeric:tabular-nums;white-space:nowrap}
td.name{font-weight:600;word-break:break-word}
table.summary tbody tr:nth-child(even){background:#fafbfc}
table.facts th{width:34%;font-weight:600;color:#394156;background:none}
table.facts td,table.facts th{border-bottom:1px solid #eceef2}
.badge{display:inline-block;padding:1px 9px;border-radius:999px;font-size:.8rem;font-weight:600;
border:1px solid;white-space:nowrap}
.badge.good{background:#e4eef8;color:#173a66;border-color:#8fb3d9}
.badge.fair{background:#fbefd9;color:#6b4300;border-color:#e0b15c}
.badge.poor{background:#f6e1ec;color:#6e1c47;border-color:#c98aab}
.badge.neutral{background:#eef0f3;color:#394156;border-color:#c4cad4}
.badge.poor::before{content:"⚠ "}
.chip{display:inline-block;background:#eef0f3;border:1px solid #d5d9e0;border-radius:4px;
padding:0 6px;margin:1px 4px 1px 0;font-size:.78rem;color:#394156}
ul.verdicts{list-style:none;margin:0;padding:0}
ul.verdicts li{margin:1px 0;white-space:nowrap}
.cautions{background:#fff8ec;border:1px solid #edc98a;border-left:5px solid var(--amber);
border-radius:6px;padding:12px 18px;margin:18px 0 4px}
.cautions h3{margin:0 0 6px;color:#6b4300}
.cautions ul{margin:0;padding-left:20px}
.note{font-size:.84rem;color:var(--slate);margin:6px 0 0}
.cand-head{display:flex;align-items:center;gap:14px;justify-content:space-between;
border-bottom:2px solid var(--ink);margin:-4px 0 16px;padding-bottom:8px}
.cand-head h2{margin:0}
.rank{display:inline-block;min-width:1.8em;text-align:center;background:var(--ink);color:#fff;
border-radius:4px;font-size:.95rem;margin-right:6px;padding:0 4px}
.cand-top{display:grid;grid-template-columns:minmax(0,1fr) minmax(0,1fr);gap:22px;align-items:start}
@media (max-width:900px){.cand-top{grid-template-columns:1fr}}
.flags{margin:12px 0 0}
ul.messages{margin:4px 0;padding-left:20px;font-size:.92rem}
.cand-cautions ul{color:#5a4010}
article.run{border:1px solid var(--rule);border-radius:6px;padding:14px 18px;margin:14px 0;
background:#fcfcfd}
.run-head{display:flex;align-items:center;justify-content:space-between;gap:12px;margin-bottom:8px}
.headline{margin:4px 0 10px;font-weight:500}
.advice{background:#eef4fa;border-left:4px solid var(--harbour);padding:8px 14px;margin:8px 0 12px;
border-radius:4px}
.advice ol{margin:0;padding-left:20px}
table.checks{margin:12px 0}
.need{color:var(--slate);font-size:.78rem;white-space:normal;margin-top:2px}
td.fig{min-width:11em;max-width:16em}
.unit{color:var(--slate)}
.advice-line{color:#173a66;font-size:.85rem;margin-top:2px}
.figures{display:grid;grid-template-columns:repeat(auto-fill,minmax(500px,1fr));gap:16px;
margin:14px 0 4px}
figure.plot{margin:0;background:#fff;border:1px solid #e3e6eb;border-radius:6px;padding:8px}
figure.plot img{display:block;width:100%;height:auto}
figure.plot figcaption{font-size:.8rem;color:var(--slate);margin-top:4px}
.cand-top figure.plot{border:none;padding:0}
.overview{max-width:760px;margin:16px 0 0}
details{margin:10px 0 0;font-size:.88rem}
details summary{cursor:pointer;color:var(--ink);font-weight:600}
table.prov{font-size:.8rem;margin:4px 0}
table.prov th{width:22%;color:#394156;font-weight:600;background:none;white-space:normal}
table.prov.list th{width:auto}
code{font-family:ui-monospace,"DejaVu Sans Mono",Menlo,Consolas,monospace;font-size:.78rem;
word-break:break-all}
.failure{color:#6e1c47;background:#f9ecf3;border-radius:4px;padding:6px 10px}
nav.toc ol{margin:0;padding-left:22px;columns:2}
footer{color:var(--slate);font-size:.82rem;padding:0 0 30px}
@media print{body{background:#fff}section{border:none;padding:0}header.masthead{color:#000;
background:#fff}
.figures{grid-template-columns:1fr 1fr}}
"""

#: At most this many candidates share the overview Arrhenius plot.
_OVERVIEW_MAX = 8

_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; base-uri 'none'; "
        "form-action 'none'")


def render_report(report, *, image_format="png", dpi=110, run_figures=True):
    """The report as one HTML string.

    Parameters
    ----------
    report : CampaignReport
    image_format : {"png", "svg"}
        How figures are embedded (base64 in ``data:`` URLs).
    dpi : float
        Resolution of embedded PNG figures.
    run_figures : bool
        Draw the figures of every run (MSD, per-axis MSD, hops, convergence, host).
        Each takes a fraction of a second; for campaigns of many candidates,
        False keeps the tables, checks and Arrhenius plots and leaves these out.

    Returns
    -------
    str
    """
    if not isinstance(report, CampaignReport):
        raise UsageError(f"render_report needs a CampaignReport, got {type(report).__name__}")
    cands = tuple(report.candidates)
    for c in cands:
        if not isinstance(c, CandidateSection):
            raise UsageError(f"CampaignReport.candidates must hold CandidateSection objects, "
                             f"got {type(c).__name__}")
        for r in c.runs:
            if not isinstance(r, RunSection):
                raise UsageError(f"CandidateSection({c.name!r}).runs must hold RunSection "
                                 f"objects, got {type(r).__name__}")
    enc = _FigureEncoder(image_format, dpi)
    enc.run_figures = bool(run_figures)
    from .. import __version__

    created = report.created_utc or datetime.now(timezone.utc).isoformat(timespec="seconds")
    n_runs = sum(len(c.runs) for c in cands)
    title = _e(report.title)
    body = []
    body.append(
        f'<header class="masthead"><div class="wrap"><p class="kicker">diffkit report</p>'
        f"<h1>{title}</h1><p class=\"meta\">{len(cands)} candidate{'s' if len(cands) != 1 else ''}"
        f" · {n_runs} run{'s' if n_runs != 1 else ''} · created {_e(created)} · diffkit "
        f"{_e(__version__)}</p>"
        + (f'<p class="intro">{_e(report.introduction)}</p>' if report.introduction else "")
        + "</div></header>")
    body.append('<main class="wrap">')
    # -- summary
    summ = ['<section id="summary"><h2>Summary</h2>', _summary_table(report)]
    summ.append('<p class="note">E<sub>a</sub> ± one standard error. σ at the target temperature '
                "is extrapolated from the Arrhenius fit with its 95% band; “&lt;” marks a 95% "
                "upper bound where the ions did not hop. " + _tiers_text(report) + "</p>")
    fits = {f"{i}. {c.name}": _get(c.summary, "fit") for i, c in enumerate(cands, 1)
            if _get(c.summary, "fit") is not None}
    kinds = {_get(f, "quantity", "D") for f in fits.values()}
    if len(fits) >= 2 and len(kinds) == 1:
        T0s = [_num(_get(c.summary, "target_temperature_K")) for c in cands
               if c.summary is not None]
        shown = dict(list(fits.items())[:_OVERVIEW_MAX])
        more = (f" Only the first {_OVERVIEW_MAX} candidates of the table are drawn."
                if len(fits) > _OVERVIEW_MAX else "")
        fig, err = _try_figure(plots.arrhenius_overview_figure, shown,
                               target_K=T0s[0] if T0s and math.isfinite(T0s[0]) else 300.0)
        if fig is not None:
            summ.append('<div class="overview">' + enc.html(
                fig, "Candidates with a fit: fitted lines with their 95% bands, extrapolated to "
                "the target temperature." + more, "Arrhenius overview of all candidates")
                + "</div>")
    summ.append(_cautions_box(REPORT_CAUTIONS))
    summ.append("</section>")
    body.append("".join(summ))
    # -- contents
    if len(cands) > 1:
        body.append('<section id="contents"><h2>Candidates</h2><nav class="toc"><ol>'
                     + "".join(f'<li><a href="#cand-{i}">{_e(c.name)}</a></li>'
                               for i, c in enumerate(cands, 1))
                     + "</ol></nav></section>")
    for i, c in enumerate(cands, 1):
        body.append(_candidate_section(c, i, enc))
    if report.settings or report.provenance:
        prov = ['<section id="provenance"><h2>Settings and provenance</h2>']
        if report.settings:
            prov.append("<h3>Settings</h3>" + _plain(report.settings))
        if report.provenance:
            prov.append("<h3>Provenance</h3>" + _plain(report.provenance))
        prov.append("</section>")
        body.append("".join(prov))
    body.append("</main>")
    body.append(f'<footer class="wrap">Made with diffkit {_e(__version__)}. Computed values '
                'are screening estimates that defer to measurement; see '
                '<a href="#cautions">the cautions</a>.</footer>')
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">'
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            '<meta name="generator" content="diffkit">'
            f"<title>{title}</title><style>{_CSS}</style></head><body>"
            + "\n".join(body) + "</body></html>\n")


def write_report(path, report, *, image_format="png", dpi=110, run_figures=True):
    """Write the report to one self-contained HTML file, atomically.

    Parameters
    ----------
    path : str or path-like
    report : CampaignReport
    image_format : {"png", "svg"}
    dpi : float
    run_figures : bool
        See :func:`render_report`.

    Returns
    -------
    str
        The path written.
    """
    import os

    text = render_report(report, image_format=image_format, dpi=dpi, run_figures=run_figures)
    path = os.fspath(path)
    with atomic_write(path) as f:
        f.write(text)
    return path
