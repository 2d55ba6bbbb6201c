"""``diffkit ingest``: trajectory files -> one HDF5 run file."""

from __future__ import annotations

import argparse
import os

from .options import add_read_options, print_json, read_options

EXAMPLE = """example:
  diffkit ingest run_900K/XDATCAR --frame-interval 20fs --temperature 900K -o candA_900K.h5
  diffkit ingest part1.lammpstrj.gz part2.lammpstrj.gz --md-timestep 2fs --type-map 1=Li,2=P,3=S \\
      --temperature 1000K -o candB_1000K.h5      # a restarted run: parts in order

Several files given in order make one continuous run: frames repeated at a join are dropped and
positions must continue across it. Values the files lack (frame interval, temperature) come from
the options here or from a run card (runcard.toml or <file>.runcard.toml beside the files)."""


def add_parser(sub):
    p = sub.add_parser("ingest", help="read trajectory files into one HDF5 run file",
                       description="Read trajectory files (restarts in order), unwrap them and "
                                   "write one HDF5 run file that later steps read.",
                       epilog=EXAMPLE, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("files", nargs="+", help="trajectory files of one run, in order")
    p.add_argument("-o", "--output", required=True, help="run file to write (.h5)")
    p.add_argument("--compress", action="store_true",
                   help="gzip-compress positions (smaller, but several times slower to analyse)")
    p.add_argument("--json", action="store_true", help="print a JSON summary instead of text")
    add_read_options(p)
    return p


def run(args):
    from ..io.store import ingest, open_run
    from ..progress import ProgressBar
    from ..report.tables import run_overview, run_overview_text

    if os.path.abspath(args.output) in {os.path.abspath(f) for f in args.files}:
        from ..errors import UsageError

        raise UsageError(f"output {args.output} is also an input file; choose another name")
    with ProgressBar("ingest", unit="frames") as bar:
        ingest(args.files, args.output, read_options(args),
               compression="gzip" if args.compress else None, progress=bar)
    traj = open_run(args.output)
    overview = run_overview(traj)
    if args.json:
        print_json({"run_file": os.path.abspath(args.output), "run": overview})
    else:
        print(run_overview_text(overview, title=f"wrote {args.output}"))
    return 0
