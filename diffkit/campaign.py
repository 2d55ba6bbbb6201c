"""Campaigns: many candidates × temperatures, resumable, on a process pool or Dask.

Layout of the output folder (``--out``)::

    runs/<candidate>/<label>.h5          run file: trajectory + /results + attrs input_key
    runs/<candidate>/<label>.failed.json a run that failed: its one-line reason and key
    runs/<candidate>/<label>.figures.jsonl  the run's report figures, drawn by its worker
    candidates/<candidate>.json          Arrhenius fit, σ(target) with band, tier, flags
    summary.csv, summary.json            candidates ranked by σ(target)
    report.html                          the self-contained report
    .content-hashes.json                 cache of input SHA-256 by (path, size, mtime)
    .outputs-key.json                    what the summaries and report were made from

A run is recomputed only when its key — the SHA-256 of its input files'
contents (and of their run cards), its read options, its analysis settings and
diffkit's version — changed. Runs whose stored key matches are reused in the
main process without starting a pool or touching the Dask cluster; the
summaries and the report are rewritten only when what they show changed. Every
file is written atomically (temporary file, then rename), so a campaign killed
at any point resumes cleanly: a half-written file is never taken as done.
Every resampling inside the analysis is seeded from the data, so results do
not depend on order, pool size or interruptions.

When the report is wanted, each worker also draws its run's report figures
right after the analysis and keeps them, encoded, in the run's figure file
(keyed by the run key and by what draws the figures: diffkit's and
matplotlib's versions and the drawing code), so that the main process only
assembles the report. Figures are not results: they never enter the results
or the summaries; a missing or stale figure file only means the report draws
that run's figures itself.
"""

from __future__ import annotations

import collections
import csv
import dataclasses
import functools
import hashlib
import io
import json
import os
import re
import traceback
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from multiprocessing import get_context

from ._worker_env import DASK_SETTINGS, dask_profiler_paused, read_single_threaded, tune_malloc
from .errors import DiffkitError, InputError, UsageError
from .io.atomic import atomic_path, atomic_write
from .io.manifest import read_manifest

__all__ = ["CampaignResult", "RunOutcome", "run_campaign", "campaign_status", "slug",
           "DASK_SETTINGS", "HOP_EVENT_FIELDS"]

_HASH_CACHE = ".content-hashes.json"
_OUTPUTS_KEY = ".outputs-key.json"


def slug(text):
    """A file-name-safe form of a candidate name or run label."""
    s = re.sub(r"[^A-Za-z0-9._-]+", "_", str(text)).strip("._")
    return s or "unnamed"


# --------------------------------------------------------------------------- keys and hashes
def _load_hash_cache(out_dir):
    try:
        with open(os.path.join(out_dir, _HASH_CACHE), encoding="utf-8") as f:
            return json.load(f)
    except (OSError, ValueError):
        return {}


def _content_hash(path, cache):
    from .io.assemble import file_fingerprint

    try:
        st = os.stat(path)
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror})") from exc
    ident = [st.st_size, st.st_mtime_ns]
    hit = cache.get(path)
    if hit and hit.get("ident") == ident:
        return hit["sha256"]
    digest = file_fingerprint(path)["sha256"]
    cache[path] = {"ident": ident, "sha256": digest}
    return digest


def _version_tag():
    from . import __version__

    return __version__


def _run_key(file_hashes, read_options, analysis):
    blob = json.dumps({"files": file_hashes, "read": read_options, "analysis": analysis,
                       "diffkit": _version_tag()}, sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()


@functools.lru_cache(maxsize=None)
def _figure_style():
    """A digest of what draws the report figures: versions and the drawing code's source.

    Any change to the figures, their captions or their encoding (the modules
    below, matplotlib, diffkit's version) changes it, so cached figures are
    drawn again. Read from the files, without importing matplotlib.
    """
    from importlib import metadata

    h = hashlib.sha256(_version_tag().encode())
    try:
        h.update(metadata.version("matplotlib").encode())
    except metadata.PackageNotFoundError:  # pragma: no cover - matplotlib is a dependency
        h.update(b"matplotlib ?")
    folder = os.path.join(os.path.dirname(os.path.abspath(__file__)), "report")
    for name in ("plots.py", "html.py", "campaign_report.py"):
        try:
            with open(os.path.join(folder, name), "rb") as f:
                h.update(f.read())
        except OSError:  # an installation without sources: the version alone
            h.update(name.encode())
    return h.hexdigest()


def _figure_key(run_key):
    return hashlib.sha256(f"{run_key}:{_figure_style()}".encode()).hexdigest()


# --------------------------------------------------------------------------- tasks
@dataclasses.dataclass(frozen=True)
class _Task:
    candidate: str
    label: str
    files: tuple
    read_options: dict
    analysis: dict
    key: str
    run_path: str
    failed_path: str
    figures_path: str = ""
    figure_key: str = ""
    draw_figures: bool = False  # draw the report figures in the worker (not part of the key)


#: Per-hop event lists of a run's hop census: kept in its run file, left out of the
#: campaign's summary.json and ``--json`` output.
HOP_EVENT_FIELDS = ("hop_times_ps", "hop_frames", "hop_ions", "hop_jump_distances_A")


@dataclasses.dataclass(frozen=True)
class RunOutcome:
    """What became of one run: ``status`` is "done", "reused" or "failed"."""

    candidate: str
    label: str
    status: str
    run_path: str
    results: dict | None = None
    reason: str = ""

    def to_dict(self):
        """Plain data for the summaries and ``--json``; per-hop event lists left out.

        The lists (one entry per hop: :data:`HOP_EVENT_FIELDS`, about 1 MB per
        run with many hops) stay in the run file's results. Shallow otherwise:
        ``results`` is already plain data (a deep copy costs seconds per campaign).
        """
        out = {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}
        hops = ((self.results or {}).get("assessment") or {}).get("hops")
        if isinstance(hops, dict) and any(k in hops for k in HOP_EVENT_FIELDS):
            assessment = dict(self.results["assessment"],
                              hops={k: v for k, v in hops.items() if k not in HOP_EVENT_FIELDS})
            out["results"] = dict(self.results, assessment=assessment)
        return out


def _analysis_settings(cand, run):
    s = cand.settings
    return {
        "mobile": list(cand.mobile),
        "reference": s.get("reference"),
        "window_ps": list(s["window"]) if s.get("window") else None,
        "method": s.get("method", "gls"),
        "temperature_K": run.temperature_K,
        "layout": 2,  # version of the stored results; bump when analyse_run's output changes
    }


def _load_manifest(manifest_path):
    """Read the manifest and check the choices only the analysis knows (the diffusion method)."""
    from .diffusion import METHODS

    manifest = read_manifest(manifest_path)
    for cand in manifest.candidates:
        method = cand.settings.get("method")
        if method is not None and method not in METHODS:
            raise InputError(f"{manifest.path}: candidate {cand.name!r}: method = {method!r} is "
                             f"not one of {', '.join(METHODS)}")
    return manifest


def _read_options_dict(run):
    d = dataclasses.asdict(run.read_options())
    if d.get("type_map"):
        d["type_map"] = {str(k): v for k, v in d["type_map"].items()}
    return d


def _plan_tasks(manifest, out_dir, cache):
    from .io.runcard import find_runcard

    tasks = []
    for cand in manifest.candidates:
        labels = set()
        for i, run in enumerate(cand.runs):
            label = run.label or (f"T{run.temperature_K:g}K" if run.temperature_K else f"run{i + 1}")
            if label in labels:
                label = f"{label}-{i + 1}"
            labels.add(label)
            folder = os.path.join(out_dir, "runs", slug(cand.name))
            run_path = os.path.join(folder, slug(label) + ".h5")
            failed_path = os.path.join(folder, slug(label) + ".failed.json")
            figures_path = os.path.join(folder, slug(label) + ".figures.jsonl")
            read_opts = _read_options_dict(run)
            analysis = _analysis_settings(cand, run)
            try:
                hashes = []
                for f in run.files:  # a run card beside a file is an input too
                    card = find_runcard(f) if read_opts.get("use_runcards", True) else None
                    hashes.append([_content_hash(f, cache),
                                   None if card is None else _content_hash(card, cache)])
                key = _run_key(hashes, read_opts, analysis)
            except InputError as exc:
                hashes, key = None, "unreadable:" + str(exc)
            tasks.append(_Task(cand.name, label, tuple(run.files), read_opts, analysis, key,
                               run_path, failed_path, figures_path, _figure_key(key)))
    return tasks


def _stored_key(run_path):
    import h5py

    try:
        with h5py.File(run_path, "r") as h5:
            return str(h5.attrs.get("input_key", ""))
    except OSError:
        return None


def _failure_record(failed_path):
    try:
        with open(failed_path, encoding="utf-8") as f:
            record = json.load(f)
    except (OSError, ValueError):
        return None
    return record if isinstance(record, dict) else None


def _failed_key(failed_path):
    record = _failure_record(failed_path)
    return None if record is None else record.get("input_key")


def _previous_outcome(task):
    """The stored outcome of ``task`` if its inputs are unchanged, else None.

    A run file whose key matches is reused; a failure with the same key is
    reported again without retrying, unless it was unexpected (not a diffkit
    error: a bug, a full disk, memory), which is tried again.
    """
    from .io.store import read_results

    if os.path.exists(task.run_path) and _stored_key(task.run_path) == task.key:
        return RunOutcome(task.candidate, task.label, "reused", task.run_path,
                          results=read_results(task.run_path))
    record = _failure_record(task.failed_path)
    if record and record.get("input_key") == task.key and not record.get("retry", False):
        return RunOutcome(task.candidate, task.label, "failed", task.run_path,
                          reason=record.get("reason", "failed before"))
    return None


def _execute(task):
    """Worker: ingest and analyse one run, or reuse it. Never raises; returns a RunOutcome."""
    from .io.assemble import ReadOptions
    from .io.store import ingest, open_run

    previous = _previous_outcome(task)
    if previous is not None:
        if previous.status == "reused":
            _cache_figures(task, previous.results)
        return previous
    try:
        if task.key.startswith("unreadable:"):
            raise InputError(task.key[len("unreadable:"):])
        opts = dict(task.read_options)
        if opts.get("type_map"):
            opts["type_map"] = {int(k): v for k, v in opts["type_map"].items()}
        os.makedirs(os.path.dirname(task.run_path), exist_ok=True)
        with atomic_path(task.run_path) as tmp:
            ingest(list(task.files), tmp, ReadOptions(**opts))
            traj = open_run(tmp)
            try:
                results = analyse_run(traj, task.analysis)
            finally:
                traj._store_handle.close()
            # the trajectory was opened under its temporary name: record the final one
            results["provenance"] = dict(results.get("provenance") or {}, run_file=task.run_path)
            _store_results(tmp, results, task.key)
        if os.path.exists(task.failed_path):
            os.unlink(task.failed_path)
        outcome = RunOutcome(task.candidate, task.label, "done", task.run_path, results=results)
    except Exception as exc:  # a bad run must not stop the campaign
        reason = str(exc) if isinstance(exc, DiffkitError) else \
            f"{type(exc).__name__}: {exc} (unexpected; details in the .failed.json file)"
        record = {"candidate": task.candidate, "label": task.label, "input_key": task.key,
                  "reason": reason.splitlines()[0] if reason else type(exc).__name__,
                  "retry": not isinstance(exc, DiffkitError),
                  "traceback": traceback.format_exc()}
        os.makedirs(os.path.dirname(task.failed_path), exist_ok=True)
        with atomic_write(task.failed_path) as f:
            json.dump(record, f, indent=2)
        return RunOutcome(task.candidate, task.label, "failed", task.run_path,
                          reason=record["reason"])
    # after the run file is complete: a kill while drawing costs only the figures
    _cache_figures(task, results)
    return outcome


# --------------------------------------------------------------------------- figure files
def _cache_figures(task, results):
    """Draw the run's report figures and keep them in its figure file. Never raises.

    The figure file is JSON lines: a header (the figure key, the number of
    images and the size of what follows in bytes), then one image record per
    line (as :func:`diffkit.report.html.render_run_images` makes them). It is
    written atomically, and read only when its key matches and it is whole.
    """
    if not task.draw_figures or _figures_ready(task):
        return
    try:
        from .report.campaign_report import render_campaign_run_images

        images = render_campaign_run_images(task.label, results)
        body = "".join(json.dumps(im) + "\n" for im in images).encode()
        header = {"figure_key": task.figure_key, "n_images": len(images),
                  "body_bytes": len(body)}
        with atomic_write(task.figures_path, "wb") as f:
            f.write(json.dumps(header).encode() + b"\n")
            f.write(body)
    except Exception:  # noqa: BLE001 - figures are optional: the report then draws them itself
        pass


def _figures_ready(task):
    """True when the run's figure file was made for its present key and is whole.

    Reads the header line only (cheap enough for every reused run of a re-run).
    """
    try:
        with open(task.figures_path, "rb") as f:
            line = f.readline()
            size = os.fstat(f.fileno()).st_size
        header = json.loads(line)
    except (OSError, ValueError):
        return False
    return (isinstance(header, dict) and header.get("figure_key") == task.figure_key
            and header.get("body_bytes") == size - len(line))


def _read_figures(task):
    """The run's cached image records, or None when missing, stale or not whole."""
    if not _figures_ready(task):
        return None
    try:
        with open(task.figures_path, encoding="utf-8") as f:
            header = json.loads(f.readline())
            images = tuple(json.loads(line) for line in f if line.strip())
    except (OSError, ValueError):
        return None
    if len(images) != header.get("n_images") or not all(isinstance(i, dict) for i in images):
        return None
    return images


def _store_results(path, results, key):
    import h5py

    from .io.store import write_result

    for name, value in results.items():
        write_result(path, name, value)
    with h5py.File(path, "r+") as h5:
        h5.attrs["input_key"] = key


def analyse_run(traj, analysis):
    """The per-run analysis of a campaign: verdict, D, hops, volume; JSON-ready dicts.

    Parameters
    ----------
    traj : Trajectory
    analysis : dict
        ``mobile`` (list of symbols), ``reference``, ``window_ps``, ``method``.

    Returns
    -------
    dict of str to dict
        ``run`` (facts: temperature, volume, ion counts), ``assessment`` (verdict,
        checks, advice, diffusion estimate, hops).
    """
    from .report.tables import run_overview  # facts only, no physics
    from .trust import assess_run

    mobile = analysis["mobile"]
    species = mobile[0] if len(mobile) == 1 else mobile
    kwargs = {}
    if analysis.get("reference"):
        kwargs["reference"] = analysis["reference"]
    if analysis.get("window_ps"):
        kwargs["window"] = tuple(analysis["window_ps"])
    if analysis.get("method"):
        kwargs["method"] = analysis["method"]
    assessment = assess_run(traj, species, **kwargs)
    facts = run_overview(traj)
    facts["n_mobile_ions"] = int(sum(traj.count(s) for s in mobile))
    facts["mobile"] = list(mobile)
    return {"run": facts, "assessment": assessment.to_dict(),
            "msd_points": msd_points(assessment.msd_curve), "provenance": traj.provenance}


def msd_points(curve, n_points=160):
    """The MSD curve at about ``n_points`` log-spaced lags (for figures; units in keys)."""
    import numpy as np

    lags = np.asarray(curve.lag_ps)
    if len(lags) <= n_points:
        sel = np.arange(len(lags))
    else:
        sel = np.unique(np.concatenate([
            [0], np.round(np.geomspace(1, len(lags) - 1, n_points)).astype(int)]))
    return {"species": list(curve.species), "reference": curve.reference,
            "lag_ps": lags[sel], "msd_A2": np.asarray(curve.msd_A2)[sel],
            "msd_axes_A2": np.asarray(curve.msd_axes_A2)[sel],
            "collective_A2": np.asarray(curve.collective_A2)[sel]}


# --------------------------------------------------------------------------- runners
def _lost(task, exc):
    """The outcome of a run whose worker process died under it (killed, out of memory)."""
    return RunOutcome(task.candidate, task.label, "failed", task.run_path,
                      reason=f"its worker process was lost ({type(exc).__name__}: killed, or out "
                             "of memory?); it is tried again when the campaign is run again")


def _run_tasks(tasks, workers, scheduler, progress, on_result):
    """Run the tasks, handing each outcome to ``on_result(i, outcome)`` as it arrives.

    ``on_result`` is called in this process (``i`` indexes ``tasks``), while
    other tasks may still compute.
    """
    if not tasks:
        return
    if scheduler is not None:
        _run_dask(tasks, scheduler, progress, on_result)
        return
    if workers is None:
        workers = os.cpu_count() or 1

    def arrived(i, outcome):
        on_result(i, outcome)
        if progress:
            progress(i + 1, len(tasks))

    if workers == 1 or len(tasks) == 1:
        for i, t in enumerate(tasks):
            arrived(i, _execute(t))
        return
    with ProcessPoolExecutor(max_workers=min(workers, len(tasks)),
                             mp_context=get_context("spawn"),
                             initializer=_worker_setup) as pool:
        futures = [pool.submit(_execute, t) for t in tasks]
        if any(t.draw_figures for t in tasks):
            _warm_up_report()  # while the workers compute, not after them
        for i, (t, fut) in enumerate(zip(tasks, futures)):
            try:
                outcome = fut.result()
            except BrokenProcessPool as exc:  # _execute never raises: the process died
                outcome = _lost(t, exc)
            arrived(i, outcome)


def _warm_up_report():
    """Import the report modules and draw one small figure in the main process.

    Called while pool workers run: matplotlib's import and font loading
    (about 1.5 s) then overlap the runs instead of delaying the report. Never
    raises (the report itself will report any real problem).
    """
    try:
        from .report import plots
        from .report.campaign_report import write_campaign_report  # noqa: F401

        from matplotlib.figure import Figure

        fig = Figure(figsize=(1, 1))
        fig.add_subplot().set_title("warm-up")
        plots.figure_bytes(fig, "png", dpi=20)
    except Exception:  # noqa: BLE001
        pass


def _worker_setup():
    """In a worker process of the pool: read with one thread (the processes fill the cores)."""
    read_single_threaded()


def _execute_on_dask(task):
    """A Dask worker's task: :func:`_execute` in the environment a run wants.

    glibc's memory thresholds as an ordinary process has them, one reading
    thread, and the worker's profiler paused (see :mod:`diffkit._worker_env`).
    """
    tune_malloc()
    read_single_threaded()
    with dask_profiler_paused():
        return _execute(task)


def _run_dask(tasks, scheduler, progress, on_result):
    try:
        from dask.distributed import Client, as_completed
    except ImportError as exc:
        raise UsageError("running on a Dask cluster needs the optional extra: "
                         "pip install 'diffkit[dask]'") from exc
    own = isinstance(scheduler, str)
    try:
        client = Client(scheduler) if own else scheduler
    except (OSError, TimeoutError, ValueError) as exc:
        raise UsageError(f"cannot reach a Dask scheduler at {scheduler!r}: {exc}") from exc
    try:
        futures = client.map(_execute_on_dask, tasks, pure=False)
        index = {fut.key: i for i, fut in enumerate(futures)}
        if any(t.draw_figures for t in tasks):
            _warm_up_report()  # while the workers compute, not after them
        done = 0
        for fut in as_completed(futures):
            i = index[fut.key]
            try:
                outcome = fut.result()
            except Exception as exc:  # _execute never raises: its worker was lost
                outcome = _lost(tasks[i], exc)
            done += 1
            on_result(i, outcome)
            if progress:
                progress(done, len(tasks))
    finally:
        if own:
            client.close()


# --------------------------------------------------------------------------- candidates
def _candidate_summary(cand, outcomes):
    """Arrhenius fit and σ(target) of one candidate from its runs' results."""
    from .conductivity import ConductivityTiers, summarize_candidate

    s = cand.settings
    Ts, D, se, bounds, vols, vol_T = [], [], [], [], [], []
    Ds, Ds_se = [], []
    n_ions = None
    flags = []
    for o in outcomes:
        if o.status == "failed" or not o.results:
            flags.append(f"run {o.label} failed: {o.reason}")
            continue
        facts = o.results["run"]
        est = o.results["assessment"]["diffusion"]
        T = facts["temperature_K"]
        if T is None:
            flags.append(f"run {o.label} has no temperature; left out of the Arrhenius fit")
            continue
        n_ions = facts["n_mobile_ions"]
        vols.append(facts["volume_mean_A3"])
        vol_T.append(T)
        value = est.get("D_cm2_per_s")
        if value is None:
            flags.append(f"run {o.label} ({T:g} K) gave no diffusion coefficient: "
                         f"{est.get('message', '')}")
            continue
        if est.get("is_upper_bound"):
            bounds.append((T, value))
            continue
        Ts.append(T)
        D.append(value)
        se.append(est["D_stderr_cm2_per_s"])
        Ds.append(est.get("D_sigma_cm2_per_s"))
        Ds_se.append(est.get("D_sigma_stderr_cm2_per_s"))
    if n_ions is None:
        return None, flags + ["no run of this candidate could be analysed"]
    tiers = ConductivityTiers(tuple(s["tier_bounds_S_per_cm"])) if s.get("tier_bounds_S_per_cm") \
        else ConductivityTiers()
    by_T = dict(zip(vol_T, vols))
    vol_list = [by_T[T] for T in Ts] if Ts else [min(vols)]
    kwargs = {}
    if Ds and all(v is not None for v in Ds) and all(v is not None for v in Ds_se):
        kwargs = {"D_sigma_cm2_per_s": Ds, "D_sigma_stderr_cm2_per_s": Ds_se}
    try:
        summary = summarize_candidate(
            cand.name, Ts, D, se, n_ions=n_ions, volumes_A3=vol_list if Ts else vol_list[0],
            charge=s.get("charge"), species=cand.mobile[0], haven_ratio=s.get("haven_ratio", 1.0),
            upper_bounds=bounds or None, target_K=s.get("target_temperature", 300.0),
            tiers=tiers, **kwargs)
    except DiffkitError as exc:
        return None, flags + [f"no Arrhenius summary: {exc}"]
    return summary, flags


def _candidate_ahead(cand, outcomes, *, draw):
    """(summary, flags, Arrhenius plot images or None) of a candidate whose runs are all in.

    Called while other candidates' runs still compute; None when anything
    goes wrong (the candidate is then summarised after the runs, as usual).
    """
    try:
        summary, flags = _candidate_summary(cand, outcomes)
    except Exception:  # noqa: BLE001 - done again (and reported) after the runs
        return None
    images = None
    if draw and summary is not None:
        try:
            from .report.campaign_report import render_campaign_candidate_images

            images = render_campaign_candidate_images(cand.name, summary)
        except Exception:  # noqa: BLE001 - the report then draws it itself
            images = None
    return summary, flags, images


@dataclasses.dataclass(frozen=True)
class CampaignResult:
    """Outcome of a campaign: runs, candidate summaries, files written."""

    title: str
    out_dir: str
    outcomes: tuple
    summaries: dict        # candidate name -> CandidateSummary or None
    candidate_flags: dict  # candidate name -> list of str
    files: dict            # what was written: summary_csv, summary_json, report_html

    @property
    def n_failed(self):
        return sum(o.status == "failed" for o in self.outcomes)

    @property
    def any_unreliable(self):
        """True when a run failed or was judged unreliable (exit code 1 at the command line)."""
        from .trust import VERDICTS

        if self.n_failed:
            return True
        return any(o.results and o.results["assessment"].get("verdict") == VERDICTS[-1]
                   for o in self.outcomes)

    def to_dict(self):
        from .results import to_plain

        return {"title": self.title, "out_dir": self.out_dir,
                "runs": [o.to_dict() for o in self.outcomes],
                "candidates": {k: (None if v is None else to_plain(v))
                               for k, v in self.summaries.items()},
                "candidate_flags": self.candidate_flags, "files": self.files}


def run_campaign(manifest_path, out_dir, *, workers=None, scheduler=None, progress=None,
                 report=True):
    """Run (or resume) a campaign.

    Parameters
    ----------
    manifest_path : str
        The campaign manifest (TOML; see docs/campaigns.md).
    out_dir : str
        Output folder (created).
    workers : int, optional
        Processes of the local pool; default the number of cores; 1 runs serially.
    scheduler : str or dask.distributed.Client, optional
        Address of a running Dask scheduler (or a client) to run on instead.
    progress : callable, optional
        Called as ``progress(done, total)`` after each run.
    report : bool
        Write the HTML report.

    Returns
    -------
    CampaignResult
    """
    if workers is not None and workers < 1:
        raise UsageError(f"--workers must be at least 1, got {workers}")
    manifest = _load_manifest(manifest_path)
    out_dir = os.path.abspath(out_dir)
    os.makedirs(out_dir, exist_ok=True)
    _remove_stale_temporaries(out_dir)
    cache = _load_hash_cache(out_dir)
    tasks = _plan_tasks(manifest, out_dir, cache)
    with atomic_write(os.path.join(out_dir, _HASH_CACHE)) as f:
        json.dump(cache, f)
    # unchanged runs are taken from their files here: no pool or cluster for them
    outcomes = [_previous_outcome(t) for t in tasks]
    todo = [i for i, o in enumerate(outcomes) if o is None]
    if report:
        # the workers draw the report's run figures; reused runs whose figures are missing
        # or stale (the report's code changed, or the last campaign had no report) get
        # them drawn there too
        redraw = [i for i, o in enumerate(outcomes)
                  if o is not None and o.status == "reused" and not _figures_ready(tasks[i])]
        if todo or redraw:
            from .report.campaign_report import run_figures_wanted

            if run_figures_wanted(len(tasks)):
                tasks = [dataclasses.replace(t, draw_figures=True) for t in tasks]
                todo = sorted(todo + redraw)
    n_known = len(tasks) - len(todo)
    if progress and n_known:
        progress(n_known, len(tasks))
    step = None if not progress else (lambda done, _total: progress(n_known + done, len(tasks)))
    # a candidate whose last run has arrived gets its summary (and the report its Arrhenius
    # plot) here and now, while the workers compute the other candidates' runs
    early = {}
    waiting = collections.Counter(tasks[i].candidate for i in todo)
    candidates = {cand.name: cand for cand in manifest.candidates}

    def arrived(j, outcome):
        outcomes[todo[j]] = outcome
        name = outcome.candidate
        waiting[name] -= 1
        if waiting[name] == 0:
            mine = [o for o in outcomes if o is not None and o.candidate == name]
            early[name] = _candidate_ahead(candidates[name], mine, draw=report)

    _run_tasks([tasks[i] for i in todo], workers, scheduler, step, on_result=arrived)
    summaries, cflags = {}, {}
    for cand in manifest.candidates:
        if early.get(cand.name) is not None:
            summaries[cand.name], cflags[cand.name] = early[cand.name][:2]
            continue
        mine = [o for o in outcomes if o.candidate == cand.name]
        summaries[cand.name], cflags[cand.name] = _candidate_summary(cand, mine)
    result = CampaignResult(manifest.title, out_dir, tuple(outcomes), summaries, cflags, {})
    # summaries and report are rewritten only when what they are made from changed
    key = _outputs_key(manifest, result, tasks)
    stored = _load_outputs_key(out_dir)
    files = _summary_paths(manifest, out_dir)
    if stored.get("summaries") != key or not all(map(os.path.isfile, files.values())):
        _write_candidate_files(manifest, result)
        _write_summaries(result)
        stored["summaries"] = key
        _save_outputs_key(out_dir, stored)
    files = {k: v for k, v in files.items() if not k.startswith("candidate:")}
    if report:
        path = os.path.join(out_dir, "report.html")
        report_key = hashlib.sha256(f"{key}:{_figure_style()}".encode()).hexdigest()
        if stored.get("report") != report_key or not os.path.isfile(path):
            from .report.campaign_report import write_campaign_report

            images = {}
            for t, o in zip(tasks, result.outcomes):
                found = None if o.status == "failed" else _read_figures(t)
                if found is not None:
                    images[t.run_path] = found
            drawn = {name: e[2] for name, e in early.items() if e is not None and e[2] is not None}
            write_campaign_report(path, manifest, result, run_images=images,
                                  candidate_images=drawn)
            stored["report"] = report_key
            _save_outputs_key(out_dir, stored)  # after the report: a kill between re-renders
        files["report_html"] = path
    return dataclasses.replace(result, files=files)


def _summary_paths(manifest, out_dir):
    files = {"summary_csv": os.path.join(out_dir, "summary.csv"),
             "summary_json": os.path.join(out_dir, "summary.json")}
    for cand in manifest.candidates:
        files["candidate:" + cand.name] = os.path.join(out_dir, "candidates",
                                                       slug(cand.name) + ".json")
    return files


def _write_candidate_files(manifest, result):
    for cand in manifest.candidates:
        summary = result.summaries[cand.name]
        data = {"name": cand.name, "flags": result.candidate_flags[cand.name],
                "summary": None if summary is None else summary.to_dict()}
        path = os.path.join(result.out_dir, "candidates", slug(cand.name) + ".json")
        os.makedirs(os.path.dirname(path), exist_ok=True)
        with atomic_write(path) as f:
            json.dump(data, f, indent=2, default=str)


def _load_outputs_key(out_dir):
    try:
        with open(os.path.join(out_dir, _OUTPUTS_KEY), encoding="utf-8") as f:
            data = json.load(f)
    except (OSError, ValueError):
        return {}
    return data if isinstance(data, dict) else {}


def _save_outputs_key(out_dir, data):
    with atomic_write(os.path.join(out_dir, _OUTPUTS_KEY)) as f:
        json.dump(data, f)


def _outputs_key(manifest, result, tasks):
    """A digest of everything the summaries and the report are made from.

    Run results are a function of the run keys, and candidate summaries of the
    run results and the manifest's settings, so this is cheap and complete
    (only creation times and whether a run was computed or reused are not in it).
    """
    runs = [[t.candidate, t.label, t.key, o.status == "failed", o.reason]
            for t, o in zip(tasks, result.outcomes)]
    cands = [[c.name, c.notes, c.settings] for c in manifest.candidates]
    blob = json.dumps({"title": manifest.title, "manifest": manifest.path,
                       "settings": manifest.settings, "candidates": cands, "runs": runs,
                       "out_dir": result.out_dir, "diffkit": _version_tag()},
                      sort_keys=True, default=str)
    return hashlib.sha256(blob.encode()).hexdigest()


def _remove_stale_temporaries(out_dir):
    for root, _, names in os.walk(out_dir):
        for n in names:
            if n.startswith(".") and n.endswith(".part"):
                try:
                    os.unlink(os.path.join(root, n))
                except OSError:
                    pass


def _write_summaries(result):
    from .report.tables import campaign_rows

    rows = campaign_rows(result)
    csv_path = os.path.join(result.out_dir, "summary.csv")
    buf = io.StringIO()
    if rows:
        w = csv.DictWriter(buf, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)
    with atomic_write(csv_path) as f:
        f.write(buf.getvalue())
    json_path = os.path.join(result.out_dir, "summary.json")
    from .report.jsonout import to_jsonable

    data = to_jsonable({"title": result.title, "ranking": rows, "campaign": result.to_dict()})
    # the ranking indented for reading; the bulk (every run's results, MBs per run) compact,
    # which the C encoder writes several times faster than an indented one
    with atomic_write(json_path) as f:
        f.write('{\n"title": ' + json.dumps(data["title"]) + ',\n"ranking": '
                + json.dumps(data["ranking"], indent=2, allow_nan=False) + ',\n"campaign": '
                + json.dumps(data["campaign"], allow_nan=False) + "\n}\n")
    return {"summary_csv": csv_path, "summary_json": json_path}


def campaign_status(manifest_path, out_dir):
    """What is done, stale, failed or pending, without running anything.

    Returns
    -------
    list of dict
        One per run: candidate, label, status, reason (for failed runs).
    """
    manifest = _load_manifest(manifest_path)
    out_dir = os.path.abspath(out_dir)
    cache = _load_hash_cache(out_dir)
    rows = []
    for t in _plan_tasks(manifest, out_dir, cache):
        if os.path.exists(t.run_path):
            status = "done" if _stored_key(t.run_path) == t.key else "stale"
            reason = ""
        elif _failed_key(t.failed_path) == t.key:
            status = "failed"
            with open(t.failed_path, encoding="utf-8") as f:
                reason = json.load(f).get("reason", "")
        else:
            status, reason = "pending", ""
        rows.append({"candidate": t.candidate, "label": t.label, "status": status,
                     "reason": reason, "run_file": t.run_path})
    return rows
