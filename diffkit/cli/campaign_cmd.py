"""``diffkit campaign``: many candidates from a manifest, resumable and parallel."""

from __future__ import annotations

import argparse

from .options import print_json

EXAMPLE = """examples:
  diffkit campaign screening.toml --out results/
  diffkit campaign screening.toml --out results/ --workers 2
  diffkit campaign screening.toml --out results/ --scheduler tcp://10.0.0.5:8786   # Dask cluster
  diffkit campaign screening.toml --out results/ --status

The manifest lists candidates and their runs (format: docs/campaigns.md). A run is recomputed only
when its input files' contents or its options changed; a campaign that was stopped resumes where
it was. One bad run is reported as failed with its reason and the others go on; the exit code is
then 1 (also when any run was judged inadequate)."""


def add_parser(sub):
    p = sub.add_parser("campaign", help="many candidates × temperatures from a TOML manifest",
                       description="Run (or resume) a screening campaign described by a manifest.",
                       epilog=EXAMPLE, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("manifest", help="campaign manifest (.toml)")
    p.add_argument("--out", required=True, metavar="FOLDER", help="output folder")
    p.add_argument("--workers", type=int, help="local processes (default: number of cores)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a Dask cluster at this scheduler address (needs diffkit[dask])")
    p.add_argument("--status", action="store_true",
                   help="only tell which runs are done, stale, failed or pending")
    p.add_argument("--no-report", action="store_true", help="skip the HTML report")
    p.add_argument("--json", action="store_true", help="print JSON (schema: docs/json_schema.md)")
    return p


def run(args):
    from ..campaign import campaign_status, run_campaign
    from ..progress import ProgressBar
    from ..report.tables import campaign_text, status_text

    if args.status:
        rows = campaign_status(args.manifest, args.out)
        if args.json:
            print_json({"runs": rows})
        else:
            print(status_text(rows))
        return 1 if any(r["status"] == "failed" for r in rows) else 0
    with ProgressBar("campaign", unit="runs") as bar:
        result = run_campaign(args.manifest, args.out, workers=args.workers,
                              scheduler=args.scheduler, progress=bar, report=not args.no_report)
    if args.json:
        print_json(result)
    else:
        print(campaign_text(result))
    return 1 if result.any_unreliable else 0
