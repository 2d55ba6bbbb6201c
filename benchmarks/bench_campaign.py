"""Benchmark: a synthetic screening campaign run serially, on a process pool and on Dask.

A campaign of N candidates × 4 temperatures (600, 750, 900, 1050 K) is written
with diffkit's known-answer hopping model (``diffkit.synth.arrhenius_campaign``):
each run has 100–200 atoms (32–56 Li plus a framework) and ``--frames`` frames
0.05 ps apart, as uncompressed XDATCAR, LAMMPS dump or extended XYZ in turn,
each with a run card. Then, each in a fresh Python process (so that peak memory
is its own), measured in the same session:

* ``serial``  — ``run_campaign(workers=1)``;
* ``pool``    — ``run_campaign(workers=2)`` (process pool, spawn);
* ``dask``    — ``run_campaign(scheduler=client)`` on a
  ``dask.distributed.LocalCluster(n_workers=2, threads_per_worker=1)``
  (cluster start-up reported apart, not in the campaign time);
* ``dask-quiet`` — the same with ``diffkit.campaign.DASK_SETTINGS`` (the
  Dask settings docs/campaigns.md recommends: the event loops of workers,
  nannies and scheduler wake less often) in the configuration the workers
  inherit. In both Dask modes diffkit's tasks set glibc's memory thresholds of
  their worker and pause its sampling profiler themselves;
* ``rerun``   — the serial campaign again with nothing changed, in-process and
  as the ``diffkit campaign`` command (interpreter start-up included).

On a shared machine, compare the wall times with the CPU times and the load
average printed beside them: a speed-up is only meaningful when the campaign
had the cores to itself.

Every campaign writes its summaries and the HTML report. Reported: wall time,
the part spent on the runs (up to the last run's completion; each worker draws
its runs' report figures as part of them) and the part after (candidate fits,
their Arrhenius plots, summaries, assembling the report); peak RSS of the main process and of each
worker (``ru_maxrss``: of the pool's workers the largest, as the kernel reports
for children; of each Dask worker its own). The results of the pool and Dask
campaigns are checked to be identical to the serial one.

Goals (issue "Step 9"): parallel speed-up ≥ 1.7× on 2 cores; a re-run with
nothing changed ≥ 20× faster than the first.

Usage::

    python benchmarks/bench_campaign.py                          # 50 × 4 × 10,000 frames
    python benchmarks/bench_campaign.py --candidates 10          # smaller
    python benchmarks/bench_campaign.py --candidates 10 --frames 2000 --data /scratch/bench

The full size writes ~13 GB of trajectories and ~9 GB of run files per campaign
and takes hours on 2 cores; ``--data`` keeps the generated trajectories for
another session (they are made again only if the parameters differ).
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time

TEMPERATURES_K = (600.0, 750.0, 900.0, 1050.0)
FORMATS = ("xdatcar", "lammpsdump", "extxyz")


# --------------------------------------------------------------------------- data
def _candidate(i, n, frames):
    """Parameters of candidate i of n: Ea from 0.20 to 0.50 eV, 100–200 atoms."""
    Ea = 0.20 + 0.30 * (i / max(1, n - 1))
    n_ions = 32 + 8 * (i % 4)
    framework = {"B": 16 + 4 * (i % 3), "S": 60 + 10 * (i % 5)}
    return dict(name=f"cand{i:03d}", Ea_eV=Ea, n_ions=n_ions, framework=framework,
                fmt=FORMATS[i % len(FORMATS)], seed=1000 + i, frames=frames)


def _write_candidate(root, p):
    from diffkit.synth import arrhenius_campaign, write_run

    camp = arrhenius_campaign(temperatures_K=TEMPERATURES_K, Ea_eV=p["Ea_eV"], n_ions=p["n_ions"],
                              n_frames=p["frames"], frame_interval_ps=0.05, jump_distance_A=2.2,
                              attempt_frequency_THz=10.0, vibration_rms_A_at_300K=0.08,
                              framework=p["framework"], mobile_species="Li", seed=p["seed"])
    files = []
    for T, run in zip(TEMPERATURES_K, camp.runs):
        path = write_run(run, os.path.join(root, p["name"]), fmt=p["fmt"], name=f"T{T:g}K",
                         compress=False)
        files.append((T, os.path.relpath(path, root), run.trajectory.n_atoms))
    return p["name"], files


def make_data(root, n_candidates, frames):
    """Write the campaign (in 2 processes) unless ``root`` already holds the same one."""
    params = {"candidates": n_candidates, "frames": frames, "temperatures_K": TEMPERATURES_K,
              "layout": 1}
    stamp = os.path.join(root, "bench.json")
    manifest = os.path.join(root, "campaign.toml")
    try:
        with open(stamp, encoding="utf-8") as f:
            if json.load(f) == json.loads(json.dumps(params)) and os.path.isfile(manifest):
                print(f"using the trajectories already in {root}")
                return manifest
    except (OSError, ValueError):
        pass
    from concurrent.futures import ProcessPoolExecutor

    os.makedirs(root, exist_ok=True)
    t0 = time.perf_counter()
    cands = [_candidate(i, n_candidates, frames) for i in range(n_candidates)]
    with ProcessPoolExecutor(max_workers=2) as pool:
        written = dict(pool.map(_write_candidate, [root] * len(cands), cands))
    lines = ['title = "Synthetic benchmark campaign"', "", "[settings]", 'mobile = "Li"',
             'target_temperature = "300K"', ""]
    n_atoms = []
    for c in cands:
        lines += ["[[candidates]]", f'name = "{c["name"]}"', "charge = 1", ""]
        for T, rel, na in written[c["name"]]:
            lines += ["[[candidates.runs]]", f'files = ["{rel}"]', f'label = "T{T:g}K"', ""]
            n_atoms.append(na)
    with open(manifest, "w", encoding="utf-8") as f:
        f.write("\n".join(lines))
    with open(stamp, "w", encoding="utf-8") as f:
        json.dump(params, f)
    size = sum(os.path.getsize(os.path.join(d, n)) for d, _, ns in os.walk(root) for n in ns)
    print(f"wrote {len(n_atoms)} trajectories ({min(n_atoms)}–{max(n_atoms)} atoms × {frames} "
          f"frames, {size / 1e9:.2f} GB) in {time.perf_counter() - t0:.0f} s")
    return manifest


# --------------------------------------------------------------------------- one measurement
def _maxrss_MB(who=resource.RUSAGE_SELF):
    return resource.getrusage(who).ru_maxrss / 1024.0  # Linux reports KiB


def _cpu_s(who=resource.RUSAGE_SELF):
    u = resource.getrusage(who)
    return u.ru_utime + u.ru_stime


def measure(mode, manifest, out):
    """Run one campaign in this process; print one JSON line with what was measured."""
    from diffkit.campaign import run_campaign

    last = [None]

    def progress(done, total):
        if done == total:
            last[0] = time.perf_counter()

    info = {"mode": mode}
    kwargs = {"workers": 1}
    cluster = client = None
    if mode == "pool":
        kwargs = {"workers": 2}
    elif mode in ("dask", "dask-quiet"):
        import dask
        from dask.distributed import Client, LocalCluster

        if mode == "dask-quiet":  # the nannies hand the configuration on to the workers
            from diffkit.campaign import DASK_SETTINGS

            dask.config.set(DASK_SETTINGS)
        t = time.perf_counter()
        cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                               dashboard_address=None)
        client = Client(cluster)
        info["cluster_start_s"] = time.perf_counter() - t
        kwargs = {"scheduler": client}
    cpu0 = _cpu_s() + _cpu_s(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    result = run_campaign(manifest, out, progress=progress, **kwargs)
    t1 = time.perf_counter()
    info["cpu_s"] = _cpu_s() + _cpu_s(resource.RUSAGE_CHILDREN) - cpu0
    info["load_average"] = os.getloadavg()[0]
    info["wall_s"] = t1 - t0
    info["runs_s"] = (last[0] or t1) - t0
    info["after_runs_s"] = t1 - (last[0] or t1)
    info["statuses"] = sorted({o.status for o in result.outcomes})
    info["n_runs"] = len(result.outcomes)
    info["main_rss_MB"] = _maxrss_MB()
    if mode == "pool":
        info["worker_rss_MB"] = [_maxrss_MB(resource.RUSAGE_CHILDREN)]
    elif mode in ("dask", "dask-quiet"):
        def usage(dask_worker=None):
            import resource as r

            u = r.getrusage(r.RUSAGE_SELF)
            return u.ru_maxrss / 1024.0, u.ru_utime + u.ru_stime

        used = list(client.run(usage).values())
        info["worker_rss_MB"] = sorted(u[0] for u in used)
        info["cpu_s"] += sum(u[1] for u in used)  # includes the workers' start-up
        client.close()
        cluster.close()
    print("RESULT " + json.dumps(info), flush=True)


def _subprocess(mode, manifest, out):
    cmd = [sys.executable, os.path.abspath(__file__), "--measure", mode, "--manifest", manifest,
           "--out", out]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    lines = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")]
    if proc.returncode != 0 or not lines:
        sys.exit(f"{mode} failed:\n{proc.stderr[-3000:]}")
    return json.loads(lines[-1][len("RESULT "):])


def _cli_rerun(manifest, out):
    t = time.perf_counter()
    proc = subprocess.run([sys.executable, "-c", "import sys; from diffkit.cli import main; "
                           "sys.exit(main())", "campaign", manifest, "--out", out,
                           "--workers", "1"], capture_output=True, text=True)
    wall = time.perf_counter() - t
    if proc.returncode not in (0, 1):
        sys.exit(f"the command failed:\n{proc.stderr[-3000:]}")
    return wall, proc.stdout


def _canonical(out):
    """The summary's numbers with paths, times and computed/reused status taken out."""
    with open(os.path.join(out, "summary.json"), encoding="utf-8") as f:
        d = json.loads(f.read().replace(os.path.abspath(out), "<OUT>"))
    for r in d["campaign"]["runs"]:
        r["status"] = r["status"] == "failed"
        if r.get("results"):
            r["results"]["provenance"].pop("created_utc", None)
    d["campaign"]["files"] = None
    return d


# --------------------------------------------------------------------------- main
def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--candidates", type=int, default=50)
    ap.add_argument("--frames", type=int, default=10_000)
    ap.add_argument("--data", help="folder for the trajectories (kept); default a temporary one")
    ap.add_argument("--keep", action="store_true", help="keep the output folders")
    ap.add_argument("--skip-dask", action="store_true")
    ap.add_argument("--measure", help=argparse.SUPPRESS)
    ap.add_argument("--manifest", help=argparse.SUPPRESS)
    ap.add_argument("--out", help=argparse.SUPPRESS)
    args = ap.parse_args(argv)
    if args.measure:
        return measure(args.measure, args.manifest, args.out)

    scratch = tempfile.mkdtemp(prefix="diffkit-bench-campaign-")
    data = args.data or os.path.join(scratch, "data")
    try:
        manifest = make_data(data, args.candidates, args.frames)
        n_runs = args.candidates * len(TEMPERATURES_K)
        print(f"campaign: {args.candidates} candidates × {len(TEMPERATURES_K)} temperatures = "
              f"{n_runs} runs, {args.frames} frames each; {os.cpu_count()} cores\n")
        rows = {}
        outs = {m: os.path.join(scratch, m) for m in ("serial", "pool", "dask", "dask-quiet")}
        rows["serial"] = _subprocess("serial", manifest, outs["serial"])
        rows["pool"] = _subprocess("pool", manifest, outs["pool"])
        if not args.skip_dask:
            for m in ("dask", "dask-quiet"):
                rows[m] = _subprocess(m, manifest, outs[m])
        rows["rerun"] = _subprocess("rerun", manifest, outs["serial"])
        cli_wall, _ = _cli_rerun(manifest, outs["serial"])

        ref = _canonical(outs["serial"])
        for m in ("pool", "dask", "dask-quiet"):
            if m in rows:
                rows[m]["identical_to_serial"] = _canonical(outs[m]) == ref

        base = rows["serial"]["wall_s"]
        print(f"{'mode':<10s} {'wall s':>8s} {'runs s':>8s} {'after s':>8s} {'speed-up':>9s} "
              f"{'CPU s':>8s} {'load':>5s} {'main RSS MB':>12s}  worker RSS MB")
        for m, r in rows.items():
            workers = ", ".join(f"{x:.0f}" for x in r.get("worker_rss_MB", [])) or "—"
            print(f"{m:<10s} {r['wall_s']:8.1f} {r['runs_s']:8.1f} {r['after_runs_s']:8.1f} "
                  f"{base / r['wall_s']:8.2f}× {r['cpu_s']:8.1f} {r['load_average']:5.1f} "
                  f"{r['main_rss_MB']:12.0f}  {workers}")
        print("(CPU s: user + system time of the campaign's processes; load: the machine's "
              "1-minute load average at the end — above the core count, other work competed)")
        if "dask" in rows:
            print(f"\nDask LocalCluster start-up (not in the times above): "
                  f"{rows['dask']['cluster_start_s']:.1f} s")
        for m in ("pool", "dask", "dask-quiet"):
            if m in rows:
                r = rows[m]
                print(f"{m}: speed-up {base / r['wall_s']:.2f}× in all, "
                      f"{rows['serial']['runs_s'] / r['runs_s']:.2f}× on the runs alone; "
                      f"results identical to serial: {r['identical_to_serial']}  (goal ≥ 1.7×)")
        print(f"re-run, nothing changed: {rows['rerun']['wall_s']:.2f} s in-process "
              f"({base / rows['rerun']['wall_s']:.0f}× faster), {cli_wall:.2f} s as the "
              f"`diffkit campaign` command with interpreter start-up "
              f"({base / cli_wall:.0f}× faster)  (goal ≥ 20×); "
              f"statuses {rows['rerun']['statuses']}")
    finally:
        if args.keep:
            print(f"\noutputs kept in {scratch}")
        else:
            shutil.rmtree(scratch, ignore_errors=True)


if __name__ == "__main__":
    main()
