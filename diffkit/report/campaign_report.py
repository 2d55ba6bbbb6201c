"""Fill the HTML report's sections from a campaign's (or a candidate's) results."""

from __future__ import annotations

import os

from .html import CampaignReport, CandidateSection, RunSection, write_report

__all__ = ["write_campaign_report", "write_candidate_report"]

_RUN_FIGURE_LIMIT = 60  # beyond this many runs, per-run figures are left out (speed)


def _settings_view(settings):
    out = {}
    for k, v in settings.items():
        if k == "target_temperature":
            out["target temperature (K)"] = v
        elif k == "tier_bounds_S_per_cm":
            out["tier boundaries (S/cm)"] = ", ".join(f"{x:g}" for x in v)
        else:
            out[k.replace("_", " ")] = v
    return out


def write_campaign_report(path, manifest, result):
    """Write the campaign's self-contained HTML report; returns the path."""
    from .tables import campaign_rows

    order = [r["candidate"] for r in campaign_rows(result)]
    sections = []
    for name in order:
        runs = []
        for o in (o for o in result.outcomes if o.candidate == name):
            if o.status == "failed" or not o.results:
                runs.append(RunSection(label=o.label, failure=o.reason or "failed"))
                continue
            res = o.results
            facts = dict(res.get("run", {}))
            facts["run file"] = os.path.relpath(o.run_path, result.out_dir)
            runs.append(RunSection(label=o.label, temperature_K=facts.get("temperature_K"),
                                   msd=res.get("msd_points"), assessment=res.get("assessment"),
                                   facts=facts, provenance=res.get("provenance", {})))
        notes = tuple(result.candidate_flags.get(name, ()))
        sections.append(CandidateSection(name=name, summary=result.summaries.get(name),
                                         runs=tuple(runs), notes=notes))
    from .. import __version__

    report = CampaignReport(
        title=manifest.title or "diffkit campaign",
        candidates=tuple(sections), settings=_settings_view(manifest.settings),
        provenance={"manifest": manifest.path, "output folder": result.out_dir,
                    "diffkit version": __version__})
    n_runs = len(result.outcomes)
    return write_report(path, report, run_figures=n_runs <= _RUN_FIGURE_LIMIT)


def write_candidate_report(path, name, summary, runs):
    """Report of one candidate; ``runs`` is a list of (input path, Trajectory, RunAssessment)."""
    from .. import __version__
    from .tables import run_overview

    sections = []
    for p, traj, a in runs:
        sections.append(RunSection(label=os.path.basename(str(p)), temperature_K=traj.temperature_K,
                                   msd=a.msd_curve, assessment=a, facts=run_overview(traj),
                                   provenance=traj.provenance))
    report = CampaignReport(title=f"diffkit: {name}",
                            candidates=(CandidateSection(name=name, summary=summary,
                                                         runs=tuple(sections)),),
                            provenance={"diffkit version": __version__})
    return write_report(path, report)
