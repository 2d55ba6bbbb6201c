"""Fill the HTML report's sections from a campaign's (or a candidate's) results."""

from __future__ import annotations

import os

from .html import (CampaignReport, CandidateSection, RunSection, render_candidate_images,
                   render_run_images, write_report)

__all__ = ["write_campaign_report", "write_candidate_report", "campaign_run_section",
           "render_campaign_run_images", "render_campaign_candidate_images", "IMAGE_FORMAT",
           "IMAGE_DPI"]

_RUN_FIGURE_LIMIT = 60  # beyond this many runs, per-run figures are left out (speed)

#: How the campaign report embeds figures; the run figures drawn ahead of time in the
#: workers (:func:`render_campaign_run_images`) are made the same way.
IMAGE_FORMAT = "png"
IMAGE_DPI = 110


def run_figures_wanted(n_runs):
    """True when the report of a campaign of ``n_runs`` runs shows per-run figures."""
    return n_runs <= _RUN_FIGURE_LIMIT


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


def campaign_run_section(label, results, *, run_file=None, images=None):
    """The report section of one analysed campaign run.

    Parameters
    ----------
    label : str
        The run's label in the campaign.
    results : dict
        The run's stored results (``run``, ``assessment``, ``msd_points``, ``provenance``).
    run_file : str, optional
        The run file's path as the report shows it.
    images : tuple of dict, optional
        Its figures drawn ahead of time (:func:`render_campaign_run_images`).

    Returns
    -------
    RunSection
    """
    facts = dict(results.get("run", {}))
    if run_file is not None:
        facts["run file"] = run_file
    return RunSection(label=label, temperature_K=facts.get("temperature_K"),
                      msd=results.get("msd_points"), assessment=results.get("assessment"),
                      facts=facts, provenance=results.get("provenance", {}), images=images)


def render_campaign_run_images(label, results):
    """Draw one campaign run's report figures now (in the worker that analysed it).

    The figures, captions and order are those :func:`write_campaign_report`
    would draw for the run; the records are JSON-ready (see
    :func:`diffkit.report.html.render_run_images`).
    """
    return render_run_images(campaign_run_section(label, results), image_format=IMAGE_FORMAT,
                             dpi=IMAGE_DPI)


def render_campaign_candidate_images(name, summary):
    """Draw one campaign candidate's Arrhenius plot now (while other runs still compute).

    The records are those :func:`write_campaign_report` would make for the
    candidate from the same ``summary`` (see
    :func:`diffkit.report.html.render_candidate_images`).
    """
    return render_candidate_images(CandidateSection(name=name, summary=summary),
                                   image_format=IMAGE_FORMAT, dpi=IMAGE_DPI)


def write_campaign_report(path, manifest, result, *, run_images=None, candidate_images=None):
    """Write the campaign's self-contained HTML report; returns the path.

    Parameters
    ----------
    path : str
    manifest : Manifest
    result : CampaignResult
    run_images : mapping of str to tuple of dict, optional
        Figures drawn ahead of time, by run file path; a run without them (or
        with images made differently) has its figures drawn here.
    candidate_images : mapping of str to tuple of dict, optional
        Candidates' Arrhenius plots drawn ahead of time from the same summaries
        (:func:`render_campaign_candidate_images`), by candidate name.
    """
    from .tables import campaign_rows

    run_images = run_images or {}
    candidate_images = candidate_images or {}
    order = [r["candidate"] for r in campaign_rows(result)]
    sections = []
    for name in order:
        runs = []
        for o in (o for o in result.outcomes if o.candidate == name):
            if o.status == "failed" or not o.results:
                runs.append(RunSection(label=o.label, failure=o.reason or "failed"))
                continue
            runs.append(campaign_run_section(
                o.label, o.results, run_file=os.path.relpath(o.run_path, result.out_dir),
                images=run_images.get(o.run_path)))
        notes = tuple(result.candidate_flags.get(name, ()))
        sections.append(CandidateSection(name=name, summary=result.summaries.get(name),
                                         runs=tuple(runs), notes=notes,
                                         images=candidate_images.get(name)))
    from .. import __version__

    report = CampaignReport(
        title=manifest.title or "diffkit campaign",
        candidates=tuple(sections), settings=_settings_view(manifest.settings),
        provenance={"manifest": manifest.path, "output folder": result.out_dir,
                    "diffkit version": __version__})
    n_runs = len(result.outcomes)
    return write_report(path, report, image_format=IMAGE_FORMAT, dpi=IMAGE_DPI,
                        run_figures=run_figures_wanted(n_runs))


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
