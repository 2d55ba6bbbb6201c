"""Turning command-line inputs (run files or trajectory files) into Trajectories."""

from __future__ import annotations

import os


def is_run_file(path):
    """True for an HDF5 file (run files are HDF5), told by its first bytes."""
    try:
        with open(path, "rb") as f:
            return f.read(8) == b"\x89HDF\r\n\x1a\n"
    except OSError:
        return False


def load_run(paths, args):
    """A Trajectory from one run file, or from trajectory files of one run (read in memory)."""
    from ..errors import UsageError
    from ..io.store import open_run
    from .options import read_options

    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    if len(paths) == 1 and is_run_file(paths[0]):
        return open_run(paths[0])
    if any(is_run_file(p) for p in paths):
        raise UsageError("give either one run file (.h5) or the trajectory files of one run, "
                         "not a mixture")
    from ..io.assemble import read_trajectory

    o = read_options(args)
    return read_trajectory(paths, format=o.format, frame_interval_ps=o.frame_interval_ps,
                           md_timestep_ps=o.md_timestep_ps, temperature_K=o.temperature_K,
                           type_map=o.type_map, units=o.units, start_ps=o.start_ps,
                           override=o.override, resample=o.resample,
                           use_runcards=o.use_runcards)
