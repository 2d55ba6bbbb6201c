"""Plain-text and CSV tables of results (no physics computed here)."""

from __future__ import annotations

import numpy as np

__all__ = ["run_overview", "run_overview_text"]


def run_overview(traj):
    """Facts of one run for a one-screen summary (JSON-ready dict, units in keys)."""
    counts = {s: int(np.sum(traj.species == s)) for s in traj.symbols}
    vol = traj.volumes_A3
    heights = None
    from ..unwrap import cell_heights

    heights = cell_heights(traj.cells[0]).tolist()
    return {
        "n_frames": traj.n_frames,
        "n_atoms": traj.n_atoms,
        "atoms_per_species": counts,
        "duration_ps": traj.duration_ps,
        "frame_interval_ps": traj.frame_interval_ps,
        "temperature_K": traj.temperature_K,
        "volume_mean_A3": float(vol.mean()),
        "volume_relative_range": float((vol.max() - vol.min()) / vol.mean()),
        "cell_heights_A": heights,
        "has_velocities": traj.has_velocities,
        "sources": [s.get("path") for s in traj.provenance.get("sources", [])],
        "notes": traj.provenance.get("notes", []),
    }


def run_overview_text(o, title=None):
    """Render :func:`run_overview` for a terminal."""
    lines = [] if title is None else [title]
    T = "not given" if o["temperature_K"] is None else f"{o['temperature_K']:g} K"
    dt = "unknown" if o["frame_interval_ps"] is None else f"{o['frame_interval_ps'] * 1000:g} fs"
    atoms = ", ".join(f"{k} {v}" for k, v in o["atoms_per_species"].items())
    lines += [
        f"  frames       {o['n_frames']} every {dt}  ({o['duration_ps']:g} ps)",
        f"  atoms        {o['n_atoms']}: {atoms}",
        f"  temperature  {T}",
        f"  volume       {o['volume_mean_A3']:.1f} Å³ (varies by {100 * o['volume_relative_range']:.2f}%)",
        "  cell heights " + " ".join(f"{h:.2f}" for h in o["cell_heights_A"]) + " Å",
        f"  velocities   {'yes' if o['has_velocities'] else 'no'}",
    ]
    for n in o.get("notes", []):
        lines.append(f"  note: {n}")
    return "\n".join(lines)


def _fmt(v, spec=".3g"):
    return "" if v is None else format(v, spec)


def campaign_rows(result):
    """One row per candidate, ranked by σ at the target temperature (best first).

    Candidates with an upper bound rank by the bound, after those with values of
    the same size; candidates without a summary come last. Units are in the keys.
    """
    rows = []
    for name, s in result.summaries.items():
        runs = [o for o in result.outcomes if o.candidate == name]
        verdicts = []
        for o in runs:
            if o.status == "failed":
                verdicts.append(f"{o.label}: failed")
            elif o.results:
                verdicts.append(f"{o.label}: {o.results['assessment'].get('verdict', '?')}")
        row = {"rank": 0, "candidate": name}
        if s is None:
            row.update({"Ea_eV": "", "Ea_stderr_eV": "", "sigma_target_mS_per_cm": "",
                        "sigma_target_low_mS_per_cm": "", "sigma_target_high_mS_per_cm": "",
                        "sigma_is_upper_bound": "", "tier": "no result",
                        "target_temperature_K": "", "haven_ratio": ""})
        else:
            lo, hi = s.sigma_target_interval95_mS_per_cm or (None, None)
            row.update({
                "Ea_eV": _fmt(s.Ea_eV, ".4f"), "Ea_stderr_eV": _fmt(s.Ea_stderr_eV, ".4f"),
                "sigma_target_mS_per_cm": _fmt(s.sigma_target_mS_per_cm),
                "sigma_target_low_mS_per_cm": _fmt(lo), "sigma_target_high_mS_per_cm": _fmt(hi),
                "sigma_is_upper_bound": "yes" if s.sigma_target_is_upper_bound else "no",
                "tier": s.tier, "target_temperature_K": _fmt(s.target_temperature_K, "g"),
                "haven_ratio": _fmt(s.haven_ratio, "g")})
        flags = list(result.candidate_flags.get(name, [])) + list(getattr(s, "flags", ()) or ())
        row["runs"] = "; ".join(verdicts)
        row["flags"] = "; ".join(flags)
        rows.append((_rank_key(s), row))
    rows.sort(key=lambda kr: kr[0])
    out = []
    for i, (_, row) in enumerate(rows, 1):
        row["rank"] = i
        out.append(row)
    return out


def _rank_key(s):
    if s is None or s.sigma_target_S_per_cm is None:
        return (2, 0.0)
    return (0 if not s.sigma_target_is_upper_bound else 1, -float(s.sigma_target_S_per_cm))


_MARK = {"pass": "ok  ", "warn": "WARN", "fail": "FAIL", "skipped": "--  "}


def diffusion_line(est, label="D"):
    """``D(Li) = 1.23e-05 ± 8.1e-07 cm²/s (95%: 1.07e-05 – 1.39e-05)`` or a bound."""
    sp = "+".join(est.species) if isinstance(est.species, (tuple, list)) else est.species
    if not est.has_value:
        return f"{label}({sp}): no value — {est.message}"
    if est.is_upper_bound:
        return f"{label}({sp}) < {est.D_cm2_per_s:.3g} cm²/s  (upper bound: {est.message})"
    lo, hi = est.D_interval95_cm2_per_s
    return (f"{label}({sp}) = {est.D_cm2_per_s:.3g} ± {est.D_stderr_cm2_per_s:.2g} cm²/s "
            f"(95%: {lo:.3g} – {hi:.3g}; {est.D_A2_per_ps:.3g} Å²/ps)")


def assessment_text(a, title=None):
    """A run's verdict, D, hops, first advice and checks, readable in ten seconds."""
    T = "?" if a.temperature_K is None else f"{a.temperature_K:g} K"
    head = f"{title} — " if title else ""
    lines = [f"{head}{a.species} at {T}, {a.duration_ps:g} ps, {a.n_ions} ions",
             f"verdict: {a.verdict.upper()} — {a.message}"]
    if a.advice:
        lines.append(f"advice:  {a.advice[0]}")
    est = a.diffusion
    lines.append(diffusion_line(est))
    if est.has_value and not est.is_upper_bound:
        w0, w1 = est.fit_window_ps
        lines.append(f"         fit window {w0:g}–{w1:g} ps, {est.method}, error from "
                     f"{est.error_source}; motion: {est.dimensionality}; reference {est.reference}")
        if est.D_sigma_cm2_per_s == est.D_sigma_cm2_per_s:  # not NaN
            lines.append(f"D_sigma (collective) = {est.D_sigma_cm2_per_s:.3g} ± "
                         f"{est.D_sigma_stderr_cm2_per_s:.2g} cm²/s")
    h = a.hops
    lines.append(f"hops: {h.total_hops} ({100 * h.fraction_ions_hopped:.0f}% of ions hopped), "
                 f"N_eff {h.n_effective_hops:.3g}, expected relative error of D "
                 f"{_pct_or_dash(a.expected_relative_error)}")
    lines.append("checks:")
    for c in a.checks:
        fig = "" if c.figure != c.figure else f": {c.figure:.3g} {c.unit}".rstrip()
        lines.append(f"  {_MARK.get(c.status, c.status):4s}  {c.title}{fig}")
        if c.status in ("warn", "fail"):  # say why only where it matters
            lines.append(f"          {c.explanation}")
    for extra in a.advice[1:]:
        lines.append(f"also:    {extra}")
    return "\n".join(lines)


def _pct_or_dash(x):
    return "—" if x is None or x != x or x == float("inf") else f"{100 * x:.0f}%"


def candidate_text(s, runs=()):
    """A candidate's Arrhenius result for a terminal; ``runs``: (label, RunAssessment) pairs."""
    lines = [f"{s.name}: {s.route_description}"]
    if s.Ea_eV is not None:
        lo, hi = s.Ea_interval95_eV
        lines.append(f"  Ea = {s.Ea_eV:.3f} ± {s.Ea_stderr_eV:.3f} eV (95%: {lo:.3f} – {hi:.3f}; "
                     f"{s.statistics})")
    T0 = s.target_temperature_K
    if s.sigma_target_S_per_cm is None:
        lines.append(f"  σ({T0:g} K): no value")
    elif s.sigma_target_is_upper_bound:
        lines.append(f"  σ({T0:g} K) < {s.sigma_target_mS_per_cm:.3g} mS/cm (upper bound)")
    else:
        lo, hi = s.sigma_target_interval95_mS_per_cm
        lines.append(f"  σ({T0:g} K) = {s.sigma_target_mS_per_cm:.3g} mS/cm "
                     f"(95%: {lo:.3g} – {hi:.3g} mS/cm)  tier: {s.tier}")
    lines.append(f"  Haven ratio {s.haven_ratio:g}, charge {s.charge:+g}; {s.volume_note}")
    for c in s.sigma_at_temperatures:
        err = "" if c.sigma_stderr_mS_per_cm is None else f" ± {c.sigma_stderr_mS_per_cm:.2g}"
        lines.append(f"  σ({c.temperature_K:g} K) = {c.sigma_mS_per_cm:.3g}{err} mS/cm (tracer D)")
    for label, a in runs:
        est = a.diffusion
        D = diffusion_line(est)
        lines.append(f"  run {label}: {a.verdict}; {D}")
    for f in s.flags:
        lines.append(f"  flag: {f}")
    for m in s.messages:
        lines.append(f"  note: {m}")
    lines.append("cautions:")
    lines.extend(f"  - {c}" for c in s.cautions)
    return "\n".join(lines)


def status_text(rows):
    """``diffkit campaign --status`` as a table."""
    counts = {}
    for r in rows:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    out = ["  ".join(f"{k} {v}" for k, v in sorted(counts.items()))]
    w = max([len(r["candidate"]) for r in rows] + [9])
    for r in rows:
        reason = f"  {r['reason']}" if r["reason"] else ""
        out.append(f"  {r['status']:<8s} {r['candidate']:<{w}s} {r['label']}{reason}")
    return "\n".join(out)


def campaign_text(result):
    """The ranking of a campaign for a terminal, with failures and where the files are."""
    from ..conductivity import CAUTIONS

    rows = campaign_rows(result)
    lines = [result.title or "campaign", ""]
    w = max([len(r["candidate"]) for r in rows] + [9])
    lines.append(f"  {'#':>2} {'candidate':<{w}s}  {'Ea / eV':<16s} {'σ(target) / mS/cm':<30s} tier")
    for r in rows:
        ea = f"{r['Ea_eV']} ± {r['Ea_stderr_eV']}" if r["Ea_eV"] else "—"
        if not r["sigma_target_mS_per_cm"]:
            sig = "—"
        elif r["sigma_is_upper_bound"] == "yes":
            sig = f"< {r['sigma_target_mS_per_cm']}"
        else:
            sig = (f"{r['sigma_target_mS_per_cm']} [{r['sigma_target_low_mS_per_cm']}, "
                   f"{r['sigma_target_high_mS_per_cm']}]")
        lines.append(f"  {r['rank']:>2} {r['candidate']:<{w}s}  {ea:<16s} {sig:<30s} {r['tier']}")
    failed = [o for o in result.outcomes if o.status == "failed"]
    reused = sum(o.status == "reused" for o in result.outcomes)
    lines.append("")
    lines.append(f"runs: {len(result.outcomes)} ({reused} reused, {len(failed)} failed)")
    for o in failed:
        lines.append(f"  FAILED {o.candidate} {o.label}: {o.reason}")
    for r in rows:
        if r["flags"]:
            lines.append(f"  {r['candidate']}: {r['flags']}")
    for k, v in result.files.items():
        lines.append(f"{k.replace('_', ' ')}: {v}")
    lines.append("")
    lines.extend(f"note: {c}" for c in CAUTIONS)
    return "\n".join(lines)
