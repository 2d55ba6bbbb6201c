"""``diffkit inspect``: one run — MSD, D, hops, verdict, advice."""

from __future__ import annotations

import argparse

from .options import add_read_options, print_json, window_ps

EXAMPLE = """examples:
  diffkit inspect candA_900K.h5 --mobile Li
  diffkit inspect run_900K/XDATCAR --frame-interval 20fs --temperature 900K --mobile Li --json
  diffkit inspect candA_900K.h5 --mobile Li --window 2ps:20ps --reference all --target-error 10%

The verdict is one of solid / tentative / inadequate; the exit code is 1 when it is inadequate.
Where too few hops were seen, D is reported as an upper bound (marked '<'), not a value."""


def percent(text):
    """argparse type: ``10%`` or ``0.1`` -> 0.1."""
    t = text.strip()
    try:
        return float(t[:-1]) / 100 if t.endswith("%") else float(t)
    except ValueError as exc:
        raise argparse.ArgumentTypeError(f"expected a fraction like 0.1 or 10%, got {text!r}") from exc


def threshold_pair(text):
    """argparse type: ``name=value`` for a verdict threshold."""
    name, sep, value = text.partition("=")
    if sep and name.strip():
        try:
            return name.strip(), float(value)
        except ValueError:
            pass
    raise argparse.ArgumentTypeError(f"expected NAME=VALUE, e.g. drift_fail=0.1; got {text!r}")


def add_analysis_options(p):
    """Options of the per-run analysis (shared with ``arrhenius``)."""
    g = p.add_argument_group("analysis")
    g.add_argument("--mobile", default="Li", help="mobile species (default Li)")
    g.add_argument("--reference", choices=("framework", "all", "none"),
                   help="drift reference (default: framework where other species exist)")
    g.add_argument("--window", type=window_ps, metavar="START:END",
                   help="fit window for D in lag time, e.g. 2ps:20ps (default: chosen and reported)")
    g.add_argument("--method", choices=("gls", "ols", "bootstrap"), default="gls",
                   help="estimator of D and its error (default gls)")
    g.add_argument("--hop-method", choices=("displacement", "sites"), default="displacement",
                   help="hop census: settled displacements (default) or site changes")
    g.add_argument("--hop-threshold", type=float, metavar="ANGSTROM",
                   help="distance that counts as a hop, Å (default: from the structure)")
    g.add_argument("--jump-distance", type=float, metavar="ANGSTROM",
                   help="jump distance for N_eff and bounds, Å (default: measured)")
    g.add_argument("--target-error", type=percent, metavar="FRACTION",
                   help="relative error on D that the advice aims at (e.g. 10%%)")
    g.add_argument("--min-hops", type=float, metavar="N",
                   help="effective hops below which D is only an upper bound")
    g.add_argument("--threshold", action="append", type=threshold_pair, default=[],
                   metavar="NAME=VALUE",
                   help="set any verdict threshold (repeatable), e.g. host_growth_fail_A2=2; "
                        "names and defaults in docs/methods_hops_and_verdict.md")


def add_parser(sub):
    p = sub.add_parser("inspect", help="analyse one run: MSD, D, hops, verdict, advice",
                       description="Analyse one run: time-origin-averaged MSD, D with its error "
                                   "bar, hops, a verdict and advice.",
                       epilog=EXAMPLE, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("inputs", nargs="+", help="a run file (.h5), or the trajectory files of one run")
    p.add_argument("--json", action="store_true", help="print JSON (schema: docs/json_schema.md)")
    add_analysis_options(p)
    add_read_options(p)
    return p


def assess_kwargs(args):
    """Keyword arguments of :func:`diffkit.trust.assess_run` from the options."""
    kw = {"method": args.method, "hop_method": args.hop_method}
    if args.reference:
        kw["reference"] = args.reference
    if args.window:
        kw["window"] = args.window
    if args.hop_threshold is not None:
        kw["hop_threshold_A"] = args.hop_threshold
    if args.jump_distance is not None:
        kw["jump_distance_A"] = args.jump_distance
    th = {}
    if args.target_error is not None:
        th["target_relative_error"] = args.target_error
    if args.min_hops is not None:
        th["min_effective_hops"] = args.min_hops
    th.update(dict(args.threshold))
    if th:
        kw["thresholds"] = th
    return kw


def run(args):
    from ..report.tables import assessment_text, run_overview
    from ..trust import VERDICTS, assess_run
    from .analysis_inputs import load_run

    from ..progress import ProgressBar

    traj = load_run(args.inputs, args)
    with ProgressBar("analysing", unit="stages") as bar:
        assessment = assess_run(traj, args.mobile, progress=bar, **assess_kwargs(args))
    if args.json:
        print_json({"inputs": list(args.inputs), "run": run_overview(traj),
                    "assessment": assessment})
    else:
        print(assessment_text(assessment, title=" ".join(args.inputs)))
    return 1 if assessment.verdict == VERDICTS[-1] else 0
