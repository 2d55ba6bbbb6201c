"""Campaigns: reuse by content, safe resumption after SIGKILL, failed runs, pool and Dask.

A small synthetic campaign (2 candidates × 3 temperatures, 16 Li among 28 atoms,
400 frames) is made with diffkit.synth and written in two real formats with run
cards. One uninterrupted serial run is the reference every other way of running
the same campaign (resumed after a kill, a process pool, a Dask cluster) must
reproduce exactly; the ranking it produces is checked against the generator's
analytic conductivities (Nernst–Einstein with CODATA constants from scipy).
"""

from __future__ import annotations

import csv
import json
import math
import os
import re
import shutil
import signal
import subprocess
import sys
import textwrap

import numpy as np
import pytest
from scipy import constants

from diffkit.campaign import campaign_status, run_campaign
from diffkit.cli import main
from diffkit.errors import InputError
from diffkit.io.store import read_results
from diffkit.synth import arrhenius_campaign, write_run

TEMPS_K = (700.0, 900.0, 1100.0)
MODEL = dict(n_ions=16, n_frames=400, frame_interval_ps=0.05, jump_distance_A=2.2,
             attempt_frequency_THz=10.0, vibration_rms_A_at_300K=0.08,
             framework={"B": 4, "S": 8}, mobile_species="Li")
# name, activation energy (eV), file format, seed
CANDIDATES = (("alpha", 0.25, "xdatcar", 1), ("beta", 0.35, "extxyz", 2))
EXT = {"xdatcar": ".xdatcar", "extxyz": ".extxyz"}


# --------------------------------------------------------------------------- helpers
def _write_data(root):
    """Trajectories + run cards under ``root``; returns {name: CampaignTruth}."""
    truths = {}
    for name, Ea, fmt, seed in CANDIDATES:
        camp = arrhenius_campaign(temperatures_K=TEMPS_K, Ea_eV=Ea, seed=seed, **MODEL)
        for T, run in zip(TEMPS_K, camp.runs):
            write_run(run, os.path.join(root, name), fmt=fmt, name=f"T{T:g}K", compress=False)
        truths[name] = camp
    return truths


def _rel(name, T):
    fmt = dict((c[0], c[2]) for c in CANDIDATES)[name]
    return f"{name}/T{T:g}K{EXT[fmt]}"


def write_manifest(root, *, settings="", extra=None, more=""):
    """The campaign manifest (paths relative to it); ``extra[name]`` adds candidate keys."""
    extra = extra or {}
    lines = ['title = "test campaign"', "", "[settings]", 'mobile = "Li"',
             'target_temperature = "300K"', "tier_bounds_S_per_cm = [1e-4, 1e-3]", settings, ""]
    for name, *_ in CANDIDATES:
        lines += ["[[candidates]]", f'name = "{name}"', "charge = 1", extra.get(name, ""), ""]
        for T in TEMPS_K:
            lines += ["[[candidates.runs]]", f'files = ["{_rel(name, T)}"]', f'label = "T{T:g}K"',
                      ""]
    path = os.path.join(root, "campaign.toml")
    with open(path, "w", encoding="utf-8") as f:
        f.write("\n".join(lines) + "\n" + more)
    return path


def canonical(out_dir, data_dir):
    """The campaign's numbers with paths, times and computed/reused status taken out.

    Returns the summary JSON (as data) and each run file's stored results.
    """
    def clean(text):
        return text.replace(os.path.abspath(out_dir), "<OUT>").replace(
            os.path.abspath(data_dir), "<DATA>")

    with open(os.path.join(out_dir, "summary.json"), encoding="utf-8") as f:
        summary = json.loads(clean(f.read()))
    for r in summary["campaign"]["runs"]:
        r["status"] = "failed" if r["status"] == "failed" else "ok"
        if r.get("results"):
            r["results"]["provenance"].pop("created_utc", None)
    summary["campaign"]["files"] = None
    runs = {}
    for folder, _, names in os.walk(os.path.join(out_dir, "runs")):
        for n in names:
            if n.endswith(".h5"):
                res = json.loads(clean(json.dumps(read_results(os.path.join(folder, n)))))
                res["provenance"].pop("created_utc", None)
                runs[os.path.relpath(os.path.join(folder, n), out_dir)] = res
    return summary, runs


def statuses(result):
    return {(o.candidate, o.label): o.status for o in result.outcomes}


def status_map(manifest, out):
    return {(r["candidate"], r["label"]): r["status"] for r in campaign_status(manifest, out)}


# --------------------------------------------------------------------------- fixtures
@pytest.fixture(scope="module")
def base(tmp_path_factory):
    """Data, manifest and the reference (uninterrupted, serial) run."""
    root = str(tmp_path_factory.mktemp("campaign_data"))
    truths = _write_data(root)
    manifest = write_manifest(root)
    ref_out = str(tmp_path_factory.mktemp("campaign_ref"))
    ref = run_campaign(manifest, ref_out, workers=1, report=False)
    return {"root": root, "manifest": manifest, "truths": truths, "ref": ref, "ref_out": ref_out,
            "canonical": canonical(ref_out, root)}


@pytest.fixture
def work(base, tmp_path):
    """A private copy of the campaign's data, for tests that change files."""
    root = str(tmp_path / "data")
    shutil.copytree(base["root"], root)
    return {"root": root, "manifest": os.path.join(root, "campaign.toml"),
            "out": str(tmp_path / "out")}


def test_summary_leaves_hop_events_to_the_run_files(base):
    from diffkit.campaign import HOP_EVENT_FIELDS

    summary, runs = base["canonical"]
    by_label = {(r["candidate"], r["label"]): r for r in summary["campaign"]["runs"]}
    n_with_hops = 0
    for o in base["ref"].outcomes:
        stored = runs[os.path.relpath(o.run_path, base["ref_out"])]["assessment"]["hops"]
        listed = by_label[(o.candidate, o.label)]["results"]["assessment"]["hops"]
        assert not set(HOP_EVENT_FIELDS) & set(listed)
        # the run file keeps one entry per hop in each list; the summary keeps the counts
        assert {len(stored[k]) for k in HOP_EVENT_FIELDS} == {stored["total_hops"]}
        assert listed == {k: v for k, v in stored.items() if k not in HOP_EVENT_FIELDS}
        n_with_hops += stored["total_hops"] > 0
    assert n_with_hops > 0
    # the outcome in memory is left whole (the report may draw the hops from it)
    assert all(set(HOP_EVENT_FIELDS) <= set(o.results["assessment"]["hops"])
               for o in base["ref"].outcomes)


# --------------------------------------------------------------------------- reuse
def test_reference_run_is_complete(base):
    ref = base["ref"]
    assert set(statuses(ref).values()) == {"done"}
    assert len(ref.outcomes) == len(CANDIDATES) * len(TEMPS_K)
    # every run's temperature came from its run card (none is given in the manifest)
    for o in ref.outcomes:
        assert o.results["run"]["temperature_K"] == pytest.approx(float(o.label[1:-1]))
        assert o.results["provenance"]["run_file"] == o.run_path


def test_rerun_reuses_and_recomputes_only_what_changed(base, work):
    m, out, root = work["manifest"], work["out"], work["root"]
    keys = [(n, f"T{T:g}K") for n, *_ in CANDIDATES for T in TEMPS_K]
    assert set(status_map(m, out).values()) == {"pending"}

    first = run_campaign(m, out, workers=1, report=False)
    assert set(statuses(first).values()) == {"done"}
    assert set(status_map(m, out).values()) == {"done"}
    # the same numbers as the reference run made elsewhere from the same inputs
    assert canonical(out, root) == base["canonical"]

    # nothing changed, or only a file's time stamp: everything reused
    os.utime(os.path.join(root, _rel("alpha", 900.0)), ns=(1, 10**18))
    again = run_campaign(m, out, workers=1, report=False)
    assert set(statuses(again).values()) == {"reused"}
    assert canonical(out, root) == base["canonical"]

    # one file's content changed: that run alone is stale and recomputed
    other = arrhenius_campaign(temperatures_K=TEMPS_K, Ea_eV=0.35, seed=99, **MODEL)
    write_run(other.runs[1], os.path.join(root, "beta"), fmt="extxyz", name="T900K",
              compress=False)
    st = status_map(m, out)
    assert st.pop(("beta", "T900K")) == "stale"
    assert set(st.values()) == {"done"}
    after = statuses(run_campaign(m, out, workers=1, report=False))
    assert after == {k: "done" if k == ("beta", "T900K") else "reused" for k in keys}
    summary, runs = canonical(out, root)
    ref_runs = base["canonical"][1]
    changed = [k for k in ref_runs if runs[k] != ref_runs[k]]
    assert changed == [os.path.join("runs", "beta", "T900K.h5")]

    # a run card is an input too: a different temperature on it recomputes that run
    card = os.path.join(root, _rel("alpha", 700.0) + ".runcard.toml")
    with open(card, encoding="utf-8") as f:
        text = f.read()
    with open(card, "w", encoding="utf-8") as f:
        f.write(text.replace('"700K"', '"710K"'))
    assert status_map(m, out)[("alpha", "T700K")] == "stale"
    res = run_campaign(m, out, workers=1, report=False)
    assert statuses(res) == {k: "done" if k == ("alpha", "T700K") else "reused" for k in keys}
    assert [o.results["run"]["temperature_K"] for o in res.outcomes][0] == 710.0

    # an analysis option of one candidate: exactly that candidate's runs recompute
    write_manifest(root, extra={"alpha": 'start = "1ps"'})
    assert {k: v for k, v in status_map(m, out).items()} == \
        {k: "stale" if k[0] == "alpha" else "done" for k in keys}
    res = run_campaign(m, out, workers=1, report=False)
    assert statuses(res) == {k: "done" if k[0] == "alpha" else "reused" for k in keys}
    assert all(o.results["run"]["n_frames"] == 380 for o in res.outcomes if o.candidate == "alpha")


def test_candidate_settings_change_summaries_without_recomputing_runs(base, work):
    m, out, root = work["manifest"], work["out"], work["root"]
    first = run_campaign(m, out, workers=1, report=False)
    write_manifest(root, extra={"beta": "haven_ratio = 2.0"})
    second = run_campaign(m, out, workers=1, report=False)
    assert set(statuses(second).values()) == {"reused"}
    # Nernst–Einstein with a Haven ratio: σ = N q² D* / (V k_B T H_R), so σ halves for H_R = 2
    # (G. E. Murch, Solid State Ionics 7, 177 (1982) — from memory)
    s1, s2 = first.summaries["beta"], second.summaries["beta"]
    assert s2.sigma_target_S_per_cm == pytest.approx(s1.sigma_target_S_per_cm / 2.0, rel=1e-12)
    assert (second.summaries["alpha"].sigma_target_S_per_cm
            == first.summaries["alpha"].sigma_target_S_per_cm)
    with open(os.path.join(out, "summary.json"), encoding="utf-8") as f:
        written = json.load(f)
    assert written["campaign"]["candidates"]["beta"]["haven_ratio"] == 2.0


# --------------------------------------------------------------------------- SIGKILL
KILL_SCRIPT = textwrap.dedent(r'''
    import contextlib, os, signal, sys
    import diffkit.campaign as C
    import diffkit.io.store as S

    manifest, out, point, nth = sys.argv[1], sys.argv[2], sys.argv[3], int(sys.argv[4])
    report = sys.argv[5:] == ["report"]
    calls = [0]

    def hit():
        calls[0] += 1
        return calls[0] == nth

    def die():
        sys.stdout.flush()
        os.kill(os.getpid(), signal.SIGKILL)

    def wrap(module, name, before=True):
        orig = getattr(module, name)
        def wrapped(*a, **k):
            if before and hit():
                die()
            value = orig(*a, **k)
            if not before and hit():
                die()
            return value
        setattr(module, name, wrapped)

    if point == "between_runs":          # at the start of the nth run: n-1 runs finished
        wrap(C, "_execute")
    elif point == "during_ingest":       # while the nth run file's frames are being written
        wrap(S._RunWriter, "append", before=False)
    elif point == "during_analysis":     # the nth run analysed, nothing of it stored yet
        wrap(C, "analyse_run", before=False)
    elif point == "during_result_write":  # the nth result written into a run file, not all
        wrap(S, "write_result", before=False)
    elif point == "during_summary_write":  # summary.json half written
        orig = C.atomic_write
        @contextlib.contextmanager
        def half(path, *a, **k):
            with orig(path, *a, **k) as f:
                yield f
                if os.path.basename(path) == "summary.json" and hit():
                    f.flush()
                    os.truncate(f.name, os.path.getsize(f.name) // 2)
                    die()
        C.atomic_write = half
    elif point == "during_figure_write":  # the nth run's figure file half written
        orig = C.atomic_write
        @contextlib.contextmanager
        def half(path, *a, **k):
            with orig(path, *a, **k) as f:
                yield f
                if path.endswith(".figures.jsonl") and hit():
                    f.flush()
                    os.truncate(f.name, os.path.getsize(f.name) // 2)
                    die()
        C.atomic_write = half
    C.run_campaign(manifest, out, workers=1, report=report)
    print("finished")
''')

# (kill point, n-th call, runs complete at the kill)
KILL_POINTS = [("between_runs", 3, 2), ("during_ingest", 4, 3), ("during_analysis", 2, 1),
               ("during_result_write", 6, 1), ("during_summary_write", 1, 6)]


@pytest.mark.parametrize("point,nth,n_done", KILL_POINTS, ids=[p[0] for p in KILL_POINTS])
def test_sigkill_then_resume_gives_the_uninterrupted_results(base, tmp_path, point, nth, n_done):
    m, out = base["manifest"], str(tmp_path / "out")
    proc = subprocess.run([sys.executable, "-c", KILL_SCRIPT, m, out, point, str(nth)],
                          capture_output=True, text=True, timeout=120)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    assert "finished" not in proc.stdout
    # what the killed campaign left: finished runs are done, nothing half-made counts as done
    st = status_map(m, out)
    assert sorted(st.values()) == ["done"] * n_done + ["pending"] * (6 - n_done)
    assert not os.path.exists(os.path.join(out, "summary.json"))
    leftovers = [n for _, _, names in os.walk(out) for n in names if n.endswith(".part")]
    if point != "between_runs":
        assert leftovers  # the kill really interrupted a write

    res = run_campaign(m, out, workers=1, report=False)
    assert sorted(statuses(res).values()) == ["done"] * (6 - n_done) + ["reused"] * n_done
    assert not [n for _, _, names in os.walk(out) for n in names if n.endswith(".part")]
    assert canonical(out, base["root"]) == base["canonical"]


def test_half_written_run_file_is_never_taken_as_done(base, work):
    m, out, root = work["manifest"], work["out"], work["root"]
    run_campaign(m, out, workers=1, report=False)
    victim = os.path.join(out, "runs", "alpha", "T900K.h5")
    with open(victim, "rb") as f:
        head = f.read(os.path.getsize(victim) // 2)
    with open(victim, "wb") as f:  # as if a non-atomic writer had died half-way
        f.write(head)
    st = status_map(m, out)
    assert st.pop(("alpha", "T900K")) == "stale"
    assert set(st.values()) == {"done"}
    res = run_campaign(m, out, workers=1, report=False)
    assert statuses(res)[("alpha", "T900K")] == "done"
    assert canonical(out, root) == base["canonical"]


# --------------------------------------------------------------------------- failed runs
def _bad_copies(root):
    """A corrupt XDATCAR and one with an unknown element symbol, with run cards."""
    src = os.path.join(root, _rel("alpha", 700.0))
    with open(src, encoding="utf-8") as f:
        lines = f.read().splitlines()
    assert lines[5].split() == ["Li", "B", "S"]
    corrupt = lines[:9] + ["0.1 0.2 banana"] + lines[10:]
    weird = lines[:5] + ["   Qx    B    S"] + lines[6:]
    os.makedirs(os.path.join(root, "gamma"))
    for name, body in (("corrupt", corrupt), ("weird", weird)):
        path = os.path.join(root, "gamma", name + ".xdatcar")
        with open(path, "w", encoding="utf-8") as f:
            f.write("\n".join(body) + "\n")
        shutil.copy(src + ".runcard.toml", path + ".runcard.toml")
    for T in (900.0, 1100.0):
        shutil.copy(os.path.join(root, _rel("alpha", T)), os.path.join(root, "gamma"))
        shutil.copy(os.path.join(root, _rel("alpha", T)) + ".runcard.toml",
                    os.path.join(root, "gamma"))
    return textwrap.dedent('''
        [[candidates]]
        name = "gamma"
        [[candidates.runs]]
        files = ["gamma/corrupt.xdatcar"]
        label = "corrupt"
        [[candidates.runs]]
        files = ["gamma/weird.xdatcar"]
        label = "weird"
        [[candidates.runs]]
        files = ["gamma/T900K.xdatcar"]
        [[candidates.runs]]
        files = ["gamma/T1100K.xdatcar"]
        ''')


@pytest.mark.filterwarnings("ignore::diffkit.errors.DiffkitWarning")
def test_bad_runs_fail_alone_with_one_line_reasons(base, work, capsys):
    m, out, root = work["manifest"], work["out"], work["root"]
    write_manifest(root, more=_bad_copies(root))
    code = main(["campaign", m, "--out", out, "--workers", "1", "--no-report", "--json"])
    assert code == 1  # DESIGN.md: 1 = done, but a run failed
    printed = json.loads(capsys.readouterr().out)
    runs = {(r["candidate"], r["label"]): r for r in printed["runs"]}
    assert len(runs) == 10
    bad = {k: r for k, r in runs.items() if r["status"] == "failed"}
    assert set(bad) == {("gamma", "corrupt"), ("gamma", "weird")}
    corrupt, weird = bad[("gamma", "corrupt")]["reason"], bad[("gamma", "weird")]["reason"]
    assert "\n" not in corrupt and "corrupt.xdatcar" in corrupt and "banana" in corrupt
    assert "\n" not in weird and "weird.xdatcar" in weird and "Qx" in weird
    # the others went on; gamma still gets an Arrhenius fit from its two good runs
    assert all(r["status"] == "done" for k, r in runs.items() if k not in bad)
    assert printed["candidates"]["gamma"] is not None
    assert any("corrupt" in fl for fl in printed["candidate_flags"]["gamma"])
    failed_json = os.path.join(out, "runs", "gamma", "corrupt.failed.json")
    assert os.path.isfile(failed_json)
    assert not os.path.exists(os.path.join(out, "runs", "gamma", "corrupt.h5"))

    # --status: failed with the same reasons, exit 1
    assert main(["campaign", m, "--out", out, "--status", "--json"]) == 1
    st = {(r["candidate"], r["label"]): r for r in json.loads(capsys.readouterr().out)["runs"]}
    assert st[("gamma", "corrupt")]["status"] == "failed"
    assert st[("gamma", "corrupt")]["reason"] == corrupt
    assert sum(r["status"] == "done" for r in st.values()) == 8

    # same inputs: the failure is reported again without retrying
    stamp = os.stat(failed_json).st_mtime_ns
    again = run_campaign(m, out, workers=1, report=False)
    assert statuses(again)[("gamma", "corrupt")] == "failed"
    assert os.stat(failed_json).st_mtime_ns == stamp
    # the file repaired: recomputed, and the failure record goes
    shutil.copy(os.path.join(root, _rel("alpha", 700.0)), os.path.join(root, "gamma",
                                                                     "corrupt.xdatcar"))
    fixed = run_campaign(m, out, workers=1, report=False)
    assert statuses(fixed)[("gamma", "corrupt")] == "done"
    assert statuses(fixed)[("gamma", "weird")] == "failed"
    assert not os.path.exists(failed_json)


def test_missing_mobile_species_and_unexpected_errors(base, work, monkeypatch):
    m, out, root = work["manifest"], work["out"], work["root"]
    write_manifest(root, extra={"beta": 'mobile = "Na"'})
    res = run_campaign(m, out, workers=1, report=False)
    for o in res.outcomes:
        if o.candidate == "beta":
            assert o.status == "failed" and "Na" in o.reason and "\n" not in o.reason
    assert res.summaries["beta"] is None and res.summaries["alpha"] is not None
    assert res.any_unreliable

    # an unexpected error (not bad input) is recorded but tried again next time
    import diffkit.campaign as campaign

    write_manifest(root)
    real = campaign.analyse_run

    def flaky(traj, analysis):
        if traj.temperature_K == 900.0:
            raise RuntimeError("disk hiccup")
        return real(traj, analysis)

    monkeypatch.setattr(campaign, "analyse_run", flaky)
    res = run_campaign(m, out, workers=1, report=False)  # beta is computed again (mobile Li)
    hit = [o for o in res.outcomes if o.status == "failed"]
    assert [(o.candidate, o.label) for o in hit] == [("beta", "T900K")]
    assert "RuntimeError: disk hiccup" in hit[0].reason and "\n" not in hit[0].reason
    assert status_map(m, out)[("beta", "T900K")] == "failed"
    monkeypatch.setattr(campaign, "analyse_run", real)
    res = run_campaign(m, out, workers=1, report=False)
    assert statuses(res) == {(n, f"T{T:g}K"): "done" if (n, T) == ("beta", 900.0) else "reused"
                             for n, *_ in CANDIDATES for T in TEMPS_K}
    assert canonical(out, root) == base["canonical"]


# --------------------------------------------------------------------------- parallel
def test_process_pool_matches_serial(base, tmp_path, capsys):
    out = str(tmp_path / "out")
    code = main(["campaign", base["manifest"], "--out", out, "--workers", "2", "--no-report",
                 "--json"])
    assert code == (1 if base["ref"].any_unreliable else 0)
    printed = json.loads(capsys.readouterr().out)
    assert {r["status"] for r in printed["runs"]} == {"done"}
    assert canonical(out, base["root"]) == base["canonical"]


@pytest.mark.slow
def test_dask_local_cluster_matches_serial(base, reported, tmp_path):
    distributed = pytest.importorskip("dask.distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, \
            distributed.Client(cluster) as client:
        out1, out2 = str(tmp_path / "client"), str(tmp_path / "address")
        res = run_campaign(base["manifest"], out1, scheduler=client, report=False)
        assert set(statuses(res).values()) == {"done"}
        assert canonical(out1, base["root"]) == base["canonical"]
        # the same by address, as `--scheduler tcp://...` does; with the report, whose run
        # figures the Dask workers draw
        res = run_campaign(base["manifest"], out2, scheduler=cluster.scheduler_address,
                           report=True)
        assert set(statuses(res).values()) == {"done"}
        assert canonical(out2, base["root"]) == base["canonical"]
        assert len(_figure_files(out2)) == len(res.outcomes)
        assert _report_text(os.path.join(out2, "report.html"), out2,
                            base["root"]) == reported["text"]
        assert len(client.scheduler_info()["workers"]) == 2


# --------------------------------------------------------------------------- manifests
GOOD_RUN = '[[candidates.runs]]\nfiles = ["a.xdatcar"]\n'
MANIFEST_ERRORS = [
    ("unknown_key", '[[candidates]]\nname = "a"\n' + GOOD_RUN + 'temprature = "600K"\n',
     ["candidate 'a', run 1", "temprature"]),
    ("unknown_setting", '[settings]\nmobil = "Li"\n[[candidates]]\nname = "a"\n' + GOOD_RUN,
     ["[settings]", "mobil"]),
    ("unknown_candidate_key", '[[candidates]]\nname = "a"\ncolour = "red"\n' + GOOD_RUN,
     ["candidate 'a'", "colour"]),
    ("missing_files", '[[candidates]]\nname = "a"\n[[candidates.runs]]\ntemperature = "600K"\n',
     ["candidate 'a', run 1", "no files"]),
    ("files_not_paths", '[[candidates]]\nname = "a"\n[[candidates.runs]]\nfiles = [1]\n',
     ["candidate 'a', run 1", "files"]),
    ("duplicate_names", '[[candidates]]\nname = "a"\n' + GOOD_RUN + '[[candidates]]\nname = "a"\n'
     + GOOD_RUN, ["'a'", "twice"]),
    ("bad_temperature_unit", '[[candidates]]\nname = "a"\n' + GOOD_RUN + 'temperature = "600 eV"\n',
     ["candidate 'a', run 1", "temperature", "eV"]),
    ("bad_time_unit", '[[candidates]]\nname = "b"\n' + GOOD_RUN + 'frame_interval = "50 K"\n',
     ["candidate 'b', run 1", "frame_interval", "K"]),
    ("bad_target_unit", '[settings]\ntarget_temperature = "300 m"\n[[candidates]]\nname = "a"\n'
     + GOOD_RUN, ["[settings]", "target_temperature"]),
    ("bad_number", '[[candidates]]\nname = "a"\nhaven_ratio = "abc"\n' + GOOD_RUN,
     ["candidate 'a'", "haven_ratio"]),
    ("bad_mobile", '[settings]\nmobile = 3\n[[candidates]]\nname = "a"\n' + GOOD_RUN,
     ["[settings]", "mobile"]),
    ("no_candidates", 'title = "x"\n', ["[[candidates]]"]),
    ("no_runs", '[[candidates]]\nname = "a"\n', ["candidate 'a'", "runs"]),
    ("not_toml", '[[candidates]\n', ["TOML"]),
]


@pytest.mark.parametrize("case,text,words", MANIFEST_ERRORS, ids=[c[0] for c in MANIFEST_ERRORS])
def test_manifest_errors_name_the_file_and_the_key(tmp_path, capsys, case, text, words):
    path = tmp_path / f"{case}.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError) as info:
        run_campaign(str(path), str(tmp_path / "out"), workers=1)
    msg = str(info.value)
    assert msg.startswith(str(path)), msg
    for w in words:
        assert w in msg, (w, msg)
    assert main(["campaign", str(path), "--out", str(tmp_path / "out")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("diffkit campaign: error: ") and str(path) in err[0]


def test_command_line_usage_error_is_one_line_without_traceback(tmp_path):
    path = tmp_path / "dup.toml"
    path.write_text(MANIFEST_ERRORS[5][1], encoding="utf-8")
    proc = subprocess.run([sys.executable, "-c", "import sys; from diffkit.cli import main; "
                           "sys.exit(main())", "campaign", str(path), "--out", str(tmp_path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1 and "twice" in proc.stderr
    proc = subprocess.run([sys.executable, "-c", "import sys; from diffkit.cli import main; "
                           "sys.exit(main())", "campaign", str(path)],
                          capture_output=True, text=True, timeout=60)
    assert proc.returncode == 2 and "--out" in proc.stderr and "Traceback" not in proc.stderr


def test_bad_options_are_usage_errors(base, tmp_path, capsys):
    out = str(tmp_path / "out")
    assert main(["campaign", base["manifest"], "--out", out, "--workers", "0"]) == 2
    assert "--workers" in capsys.readouterr().err
    dask = pytest.importorskip("dask")
    pytest.importorskip("dask.distributed")
    with dask.config.set({"distributed.comm.timeouts.connect": "1s"}):
        # nothing listens on port 9 (discard) of this machine's loopback here
        assert main(["campaign", base["manifest"], "--out", out, "--scheduler",
                     "tcp://127.0.0.1:9"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "Dask scheduler" in err[0] and "127.0.0.1:9" in err[0]


# --------------------------------------------------------------------------- outputs
def _sigma_true_S_per_cm(camp, n_ions, volume_A3, T=300.0):
    """Exact σ(T) of the hopping model: D from the Arrhenius law, then Nernst–Einstein.

    D0 = z ν a² / (2d) for nearest-neighbour hops on a simple cubic lattice (z = 6, d = 3;
    random-walk result, e.g. H. Mehrer, Diffusion in Solids, Springer 2007, ch. 7 — from
    memory); σ = N e² D / (V k_B T) (Nernst–Einstein, Haven ratio 1), CODATA via scipy.
    """
    a_m = MODEL["jump_distance_A"] * 1e-10
    nu = MODEL["attempt_frequency_THz"] * 1e12
    D_m2_s = nu * a_m ** 2 * math.exp(-camp.Ea_eV * constants.e / (constants.k * T))
    n_per_m3 = n_ions / (volume_A3 * 1e-30)
    return n_per_m3 * constants.e ** 2 * D_m2_s / (constants.k * T) / 100.0  # S/m -> S/cm


def test_outputs_rank_candidates_with_bands_and_report(base, work, monkeypatch):
    import diffkit.report.campaign_report as campaign_report

    # per-run figures are tested with the report itself; here they only cost time
    monkeypatch.setattr(campaign_report, "_RUN_FIGURE_LIMIT", 0)
    m, out = work["manifest"], work["out"]
    res = run_campaign(m, out, workers=1, report=True)
    with open(os.path.join(out, "summary.csv"), newline="", encoding="utf-8") as f:
        rows = list(csv.DictReader(f))
    with open(os.path.join(out, "summary.json"), encoding="utf-8") as f:
        summary = json.load(f)
    assert [r["candidate"] for r in rows] == [r["candidate"] for r in summary["ranking"]]
    assert [int(r["rank"]) for r in rows] == [1, 2]
    sig = [float(r["sigma_target_mS_per_cm"]) for r in rows]
    assert sig == sorted(sig, reverse=True)
    for r in rows:
        assert r["target_temperature_K"] == "300"
        assert r["sigma_is_upper_bound"] == "no"
        assert r["tier"] and "flags" in r
        lo, hi = float(r["sigma_target_low_mS_per_cm"]), float(r["sigma_target_high_mS_per_cm"])
        assert lo < float(r["sigma_target_mS_per_cm"]) < hi
    # against the generator's exact answer: the true σ(300 K) lies in each reported band,
    # and the order of the ranking is the true order
    true = {}
    for name, camp in base["truths"].items():
        s = res.summaries[name]
        true[name] = _sigma_true_S_per_cm(camp, s.n_ions, s.volume_A3)
        cell = camp.runs[0].trajectory.cells[0]
        assert s.volume_A3 == pytest.approx(abs(np.linalg.det(cell)), rel=1e-9)
        lo, hi = s.sigma_target_interval95_S_per_cm
        assert lo < true[name] < hi, (name, true[name], lo, hi)
    assert [r["candidate"] for r in rows] == sorted(true, key=true.get, reverse=True)
    for name in true:
        assert os.path.isfile(os.path.join(out, "candidates", name + ".json"))

    report = os.path.join(out, "report.html")
    with open(report, encoding="utf-8") as f:
        html = f.read()
    assert html.lstrip().lower().startswith("<!doctype html") and "alpha" in html and "beta" in html
    assert res.files["report_html"] == report
    # nothing changed: the report and summaries stay as they are (not rendered again)
    stamps = {p: os.stat(os.path.join(out, p)).st_mtime_ns
              for p in ("report.html", "summary.json", "summary.csv")}
    res2 = run_campaign(m, out, workers=1, report=True)
    assert set(statuses(res2).values()) == {"reused"}
    assert {p: os.stat(os.path.join(out, p)).st_mtime_ns for p in stamps} == stamps
    # a candidate setting changed: rewritten
    write_manifest(work["root"], extra={"alpha": "haven_ratio = 0.5"})
    run_campaign(m, out, workers=1, report=True)
    assert all(os.stat(os.path.join(out, p)).st_mtime_ns != t for p, t in stamps.items())


# --------------------------------------------------------------------------- report figures
def _report_text(path, out_dir, data_dir, copied_from=None):
    """A report's HTML with the output and data folders and every time stamp taken out.

    ``copied_from``: the folder an output folder was copied from (its run files name it).
    """
    with open(path, encoding="utf-8") as f:
        text = f.read()
    for folder in filter(None, (out_dir, copied_from)):
        text = text.replace(os.path.abspath(folder), "<OUT>")
    text = text.replace(os.path.abspath(data_dir), "<DATA>")
    return re.sub(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?([+-]\d\d:\d\d|Z)?", "<TIME>", text)


def _embedded(text):
    """(base64 data, alt text, caption) of every embedded figure, in the page's order."""
    return re.findall(r'<img src="data:image/png;base64,([^"]+)" alt="([^"]*)"[^>]*>'
                      r"<figcaption>(.*?)</figcaption>", text)


def _figure_files(out):
    return sorted(os.path.relpath(os.path.join(d, n), out) for d, _, names in os.walk(out)
                  for n in names if n.endswith(".figures.jsonl"))


@pytest.fixture
def count_drawing(monkeypatch):
    """Labels of the runs whose standard figures are drawn in this process."""
    import diffkit.report.html as report_html

    drawn = []
    real = report_html._run_figures

    def counted(run, d, h):
        drawn.append(run.label)
        return real(run, d, h)

    monkeypatch.setattr(report_html, "_run_figures", counted)
    return drawn


@pytest.fixture(scope="module")
def reported(base, tmp_path_factory):
    """The reference campaign again, with its report: run figures drawn as the runs finish."""
    out = str(tmp_path_factory.mktemp("campaign_report"))
    res = run_campaign(base["manifest"], out, workers=1, report=True)
    return {"out": out, "result": res,
            "text": _report_text(os.path.join(out, "report.html"), out, base["root"])}


def test_report_from_cached_figures_equals_the_one_drawn_in_the_parent(base, reported, tmp_path,
                                                                       count_drawing):
    from diffkit.io.manifest import read_manifest
    from diffkit.report.campaign_report import write_campaign_report

    out, res = reported["out"], reported["result"]
    # each run's figures were drawn with it and kept beside its run file; without a report
    # (the reference campaign) none are drawn
    assert _figure_files(out) == sorted(os.path.relpath(o.run_path[:-3] + ".figures.jsonl", out)
                                        for o in res.outcomes)
    assert _figure_files(base["ref_out"]) == []
    # the same report with every figure drawn here, in the main process, from the same results
    parent = str(tmp_path / "parent.html")
    write_campaign_report(parent, read_manifest(base["manifest"]), res)
    assert sorted(count_drawing) == sorted(o.label for o in res.outcomes)
    text = _report_text(parent, out, base["root"])
    assert text == reported["text"]  # the same figures (to the byte), captions and order
    figs = _embedded(reported["text"])
    # per run: MSD, per-axis MSD, hops, convergence; per candidate one Arrhenius plot; overview
    assert len(figs) == 4 * len(res.outcomes) + len(CANDIDATES) + 1
    for T in TEMPS_K:  # each candidate has a run of this label
        assert sum(f"run T{T:g}K, {T:g} K" in alt for _, alt, _ in figs) == 4 * len(CANDIDATES)
    assert len({data for data, _, _ in figs}) == len(figs)


def test_rerun_takes_the_run_figures_from_their_files(base, reported, tmp_path, count_drawing):
    m, out = base["manifest"], str(tmp_path / "out")
    shutil.copytree(reported["out"], out)
    # another output folder: the summaries and the report are written again; the runs and
    # their figures are reused
    res = run_campaign(m, out, workers=1, report=True)
    assert set(statuses(res).values()) == {"reused"}
    assert count_drawing == []
    copied = reported["out"]
    assert _report_text(os.path.join(out, "report.html"), out, base["root"],
                        copied) == reported["text"]

    # a figure file missing, one damaged, one left by other drawing code: those runs' figures
    # are drawn again (once each, with the run, not by the report) and kept again
    runs = os.path.join(out, "runs")
    os.unlink(os.path.join(runs, "alpha", "T700K.figures.jsonl"))
    damaged = os.path.join(runs, "beta", "T900K.figures.jsonl")
    os.truncate(damaged, os.path.getsize(damaged) // 2)
    old = os.path.join(runs, "beta", "T1100K.figures.jsonl")
    with open(old, encoding="utf-8") as f:
        lines = f.readlines()
    header = json.loads(lines[0])
    header["figure_key"] = "0" * 64
    with open(old, "w", encoding="utf-8") as f:
        f.writelines([json.dumps(header) + "\n"] + lines[1:])
    os.unlink(os.path.join(out, "report.html"))
    res = run_campaign(m, out, workers=1, report=True)
    assert set(statuses(res).values()) == {"reused"}
    assert sorted(count_drawing) == ["T1100K", "T700K", "T900K"]
    assert _report_text(os.path.join(out, "report.html"), out, base["root"],
                        copied) == reported["text"]
    assert len(_figure_files(out)) == 6
    del count_drawing[:]
    res = run_campaign(m, out, workers=1, report=True)  # nothing changed: nothing drawn
    assert count_drawing == []


def test_sigkill_while_caching_figures_then_resume_gives_the_same_report(base, reported,
                                                                         tmp_path):
    m, out = base["manifest"], str(tmp_path / "out")
    proc = subprocess.run([sys.executable, "-c", KILL_SCRIPT, m, out, "during_figure_write", "2",
                           "report"], capture_output=True, text=True, timeout=180)
    assert proc.returncode == -signal.SIGKILL, proc.stderr
    assert "finished" not in proc.stdout
    # figures are drawn after a run's file is complete: two runs done, the first one's figures
    # kept, the second one's cut half-way and not taken
    assert sorted(status_map(m, out).values()) == ["done"] * 2 + ["pending"] * 4
    assert _figure_files(out) == [os.path.join("runs", "alpha", "T700K.figures.jsonl")]
    leftovers = [n for _, _, names in os.walk(out) for n in names if n.endswith(".part")]
    assert len(leftovers) == 1 and leftovers[0].startswith(".T900K.figures.jsonl.")
    assert not os.path.exists(os.path.join(out, "report.html"))

    res = run_campaign(m, out, workers=1, report=True)
    assert sorted(statuses(res).values()) == ["done"] * 4 + ["reused"] * 2
    assert not [n for _, _, names in os.walk(out) for n in names if n.endswith(".part")]
    assert len(_figure_files(out)) == 6
    assert _report_text(os.path.join(out, "report.html"), out, base["root"]) == reported["text"]
    assert canonical(out, base["root"]) == base["canonical"]


@pytest.mark.slow
def test_process_pool_draws_the_run_figures_in_its_workers(base, reported, tmp_path,
                                                           count_drawing, monkeypatch):
    import diffkit.report.campaign_report as campaign_report
    import diffkit.report.plots as plots

    events = []
    real_plot, real_write = plots.arrhenius_figure, campaign_report.write_campaign_report
    monkeypatch.setattr(plots, "arrhenius_figure",
                        lambda s, **kw: events.append(("plot", s.name)) or real_plot(s, **kw))
    monkeypatch.setattr(campaign_report, "write_campaign_report",
                        lambda *a, **kw: events.append(("report", None)) or real_write(*a, **kw))
    out = str(tmp_path / "out")
    res = run_campaign(base["manifest"], out, workers=2, report=True)
    assert set(statuses(res).values()) == {"done"}
    assert count_drawing == []  # not in this process: the pool's workers drew them
    # each candidate's Arrhenius plot was drawn here as its last run came in, before the
    # report was assembled, and not again by it
    assert events == [("plot", n) for n, *_ in CANDIDATES] + [("report", None)]
    assert len(_figure_files(out)) == 6
    assert _report_text(os.path.join(out, "report.html"), out, base["root"]) == reported["text"]
    assert canonical(out, base["root"]) == base["canonical"]
