"""Options shared by several subcommands, and values with units."""

from __future__ import annotations

import argparse
import json
import sys

from ..errors import UnitsError
from ..units import parse_temperature_K, parse_time_ps


def time_ps(text):
    """argparse type: ``20fs``, ``0.02ps`` or a bare number of ps -> ps."""
    try:
        return parse_time_ps(text)
    except UnitsError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from exc


def temperature_K(text):
    """argparse type: ``900K`` or ``900`` -> K."""
    try:
        return parse_temperature_K(text)
    except UnitsError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from exc


def type_map(text):
    """argparse type: ``1=Li,2=P,3=S`` -> {1: "Li", 2: "P", 3: "S"}."""
    out = {}
    for part in text.split(","):
        if not part.strip():
            continue
        key, sep, sym = part.partition("=")
        if not sep or not key.strip().isdigit() or not sym.strip():
            raise argparse.ArgumentTypeError(
                f"cannot read {part!r} in --type-map; expected TYPE=Element pairs like 1=Li,2=S")
        out[int(key)] = sym.strip()
    return out


def window_ps(text):
    """argparse type: ``2ps:20ps`` -> (2.0, 20.0)."""
    lo, sep, hi = text.partition(":")
    if not sep:
        raise argparse.ArgumentTypeError(f"--window takes START:END, e.g. 2ps:20ps; got {text!r}")
    return (time_ps(lo), time_ps(hi))


def add_read_options(p):
    """Options that tell how to read trajectory files (ingest, inspect)."""
    g = p.add_argument_group("reading trajectory files")
    g.add_argument("--format", help="file format (detected from name or content when omitted)")
    g.add_argument("--frame-interval", type=time_ps, metavar="TIME",
                   help="time between saved frames, e.g. 20fs or 0.02ps")
    g.add_argument("--md-timestep", type=time_ps, metavar="TIME",
                   help="MD integration step, e.g. 2fs (enough for files with step numbers)")
    g.add_argument("--temperature", type=temperature_K, metavar="T",
                   help="nominal temperature of the run, e.g. 900K")
    g.add_argument("--type-map", type=type_map, metavar="MAP",
                   help="LAMMPS atom types to elements, e.g. 1=Li,2=P,3=S")
    g.add_argument("--lammps-units", choices=("metal", "real"),
                   help="LAMMPS unit style of a dump (default metal, with a warning)")
    g.add_argument("--start", type=time_ps, default=0.0, metavar="TIME",
                   help="equilibration time to drop from the start, e.g. 5ps")
    g.add_argument("--override", action="store_true",
                   help="let the values given here win where the file disagrees")
    g.add_argument("--resample", action="store_true",
                   help="when a later restart file saved frames more often, keep only the frames "
                        "on the first file's grid")
    g.add_argument("--no-runcard", action="store_true",
                   help="ignore runcard.toml / <file>.runcard.toml beside the files")


def read_options(args):
    """ReadOptions from parsed arguments."""
    from ..io.assemble import ReadOptions

    return ReadOptions(format=args.format, frame_interval_ps=args.frame_interval,
                       md_timestep_ps=args.md_timestep, temperature_K=args.temperature,
                       type_map=args.type_map, units=args.lammps_units, start_ps=args.start,
                       override=args.override, resample=args.resample,
                       use_runcards=not args.no_runcard)


def print_json(data, stream=None):
    """Print one JSON document (NaN written as null)."""
    from ..report.jsonout import to_jsonable

    json.dump(to_jsonable(data), stream or sys.stdout, indent=2, allow_nan=False)
    (stream or sys.stdout).write("\n")
