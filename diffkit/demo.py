"""The demo campaign: fictional data with known answers, and how to make it.

The scenario is invented: the "ardenite" family, imaginary lithium-containing
host structures, with three candidates — a fast conductor (A1), a moderate one
(B2) and one whose ions do not hop at the lower temperatures (C3) — each run
at four temperatures. Trajectories come from diffkit's known-answer hopping
model (diffkit.synth), written in three real formats, gzip-compressed, each
with a run card; `campaign.toml` is the manifest and `truth.json` holds the
generator's exact answers. Nothing here is real data.

The bundled copy lives in ``sample_trajectories/``;
``python sample_trajectories/regenerate.py`` rewrites it with the same seeds.
"""

from __future__ import annotations

import json
import os
import shutil

from .synth import arrhenius_campaign, write_run

__all__ = ["regenerate", "CANDIDATES", "TEMPERATURES_K", "TITLE"]

TEMPERATURES_K = (600.0, 750.0, 900.0, 1050.0)
COMMON = dict(n_ions=16, n_frames=2000, frame_interval_ps=0.05, jump_distance_A=2.2,
              attempt_frequency_THz=10.0, vibration_rms_A_at_300K=0.08,
              framework={"B": 4, "S": 8}, mobile_species="Li")
CANDIDATES = (
    # name, activation energy (eV), file format, seed
    ("ardenite-A1", 0.24, "xdatcar", 11),
    ("ardenite-B2", 0.40, "lammpsdump", 22),
    ("ardenite-C3", 0.68, "extxyz", 33),
)
TITLE = "Demo screening: the fictional ardenite family (generated data with known answers)"


def regenerate(out):
    """Write the demo campaign into ``out``; returns the manifest path."""
    os.makedirs(out, exist_ok=True)
    truth = {"title": TITLE, "note": "fictional data from diffkit.synth; exact model answers",
             "candidates": {}}
    manifest = [f'title = "{TITLE}"', "", "[settings]", 'mobile = "Li"',
                'target_temperature = "300K"', "haven_ratio = 1.0",
                "tier_bounds_S_per_cm = [1e-4, 1e-3]", ""]
    for name, Ea, fmt, seed in CANDIDATES:
        camp = arrhenius_campaign(temperatures_K=TEMPERATURES_K, Ea_eV=Ea, seed=seed, **COMMON)
        folder = os.path.join(out, name)
        if os.path.isdir(folder):
            shutil.rmtree(folder)
        manifest += ["[[candidates]]", f'name = "{name}"', "charge = 1", ""]
        runs = []
        for T, run in zip(TEMPERATURES_K, camp.runs):
            path = write_run(run, folder, fmt=fmt, name=f"T{T:g}K", compress=True)
            rel = os.path.relpath(path, out)
            manifest += ["[[candidates.runs]]", f'files = ["{rel}"]', f'label = "T{T:g}K"', ""]
            runs.append({"temperature_K": T, "file": rel,
                         "D_cm2_per_s": run.truth.D_cm2_per_s,
                         "expected_hops": run.truth.total_rate_per_ps * COMMON["n_ions"]
                         * run.trajectory.duration_ps,
                         "hops_in_run": int(len(run.truth.hop_times_ps))})
        truth["candidates"][name] = {"Ea_eV": Ea, "D0_cm2_per_s": camp.D0_cm2_per_s,
                                     "D300_cm2_per_s": camp.D300_cm2_per_s, "format": fmt,
                                     "runs": runs}
    with open(os.path.join(out, "campaign.toml"), "w", encoding="utf-8") as f:
        f.write("\n".join(manifest))
    with open(os.path.join(out, "truth.json"), "w", encoding="utf-8") as f:
        json.dump(truth, f, indent=2)
    return os.path.join(out, "campaign.toml")
