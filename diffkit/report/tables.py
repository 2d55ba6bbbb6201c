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
