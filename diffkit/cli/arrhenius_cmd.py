"""``diffkit arrhenius``: several runs of one candidate -> Ea, σ at each T and at the target."""

from __future__ import annotations

import argparse
import os

from .inspect_cmd import add_analysis_options, assess_kwargs
from .options import add_read_options, print_json, temperature_K

EXAMPLE = """examples:
  diffkit arrhenius candA_600K.h5 candA_750K.h5 candA_900K.h5 candA_1100K.h5 --mobile Li
  diffkit arrhenius runs/*.h5 --mobile Na --haven-ratio 0.5 --target 298K --plot arrhenius.png
  diffkit arrhenius T*/XDATCAR.gz --mobile Li --report candA.html --name "Vexolite-A"

Each input is one run: a run file (.h5), or one trajectory file whose frame interval and
temperature come from a run card beside it. Temperatures with too few hops enter as upper bounds,
kept out of the fit and checked against it. The exit code is 1 when any run was judged inadequate.
Values at the target temperature are screening estimates from an extrapolation that assumes one
mechanism and no phase change; they defer to measurement."""


def tiers_arg(text):
    """argparse type: two boundaries in S/cm, e.g. ``1e-4,1e-3``."""
    try:
        lo, hi = (float(x) for x in text.split(","))
    except ValueError as exc:
        raise argparse.ArgumentTypeError(
            f"--tiers takes two boundaries in S/cm, e.g. 1e-4,1e-3; got {text!r}") from exc
    return lo, hi


def add_candidate_options(p):
    """Options of the candidate-level summary (shared with ``campaign`` overrides)."""
    g = p.add_argument_group("conductivity")
    g.add_argument("--charge", type=float, help="charge of the mobile ion, e (default: +1 for "
                                                "alkali, +2 for alkaline-earth and Zn ions)")
    g.add_argument("--haven-ratio", type=float, default=1.0,
                   help="Haven ratio for σ from tracer D (default 1, stated in every output)")
    g.add_argument("--target", type=temperature_K, default=300.0, metavar="T",
                   help="target temperature for the extrapolation (default 300K)")
    g.add_argument("--tiers", type=tiers_arg, metavar="LOW,HIGH",
                   help="screening tier boundaries in S/cm (default 1e-4,1e-3)")
    g.add_argument("--volume", choices=("lowest", "linear"), default="lowest",
                   help="cell volume used at the target: the lowest simulated temperature's "
                        "(default) or a linear extrapolation of <V>(T)")
    g.add_argument("--route", choices=("tracer_D", "sigma_T"), default="tracer_D",
                   help="fit ln D then Nernst–Einstein (default), or fit ln(σT)")


def add_parser(sub):
    p = sub.add_parser("arrhenius", help="several runs of one candidate: Ea, σ(T), σ at 300 K, tier",
                       description="Analyse several runs of one candidate at different "
                                   "temperatures: Arrhenius fit, conductivity and tier.",
                       epilog=EXAMPLE, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("runs", nargs="+", help="one file per run (run file or trajectory with run card)")
    p.add_argument("--name", default="candidate", help="candidate name for tables and reports")
    p.add_argument("--json", action="store_true", help="print JSON (schema: docs/json_schema.md)")
    p.add_argument("--plot", metavar="FILE", help="write the Arrhenius plot (.png, .svg or .pdf)")
    p.add_argument("--report", metavar="FILE", help="write a self-contained HTML report")
    add_candidate_options(p)
    add_analysis_options(p)
    add_read_options(p)
    return p


def run(args):
    from ..conductivity import ConductivityTiers, summarize_candidate
    from ..errors import UsageError
    from ..progress import ProgressBar
    from ..report.tables import candidate_text
    from ..trust import VERDICTS, assess_run
    from .analysis_inputs import load_run

    if len(args.runs) < 1:
        raise UsageError("give at least one run")
    assessments, trajs = [], []
    with ProgressBar("analysing runs", total=len(args.runs), unit="runs") as bar:
        for i, path in enumerate(args.runs):
            traj = load_run([path], args)
            if traj.temperature_K is None:
                raise UsageError(f"{path}: the run has no temperature; give it with --temperature "
                                 "at ingest or in a run card")
            assessments.append(assess_run(traj, args.mobile, **assess_kwargs(args)))
            trajs.append(traj)
            bar(i + 1)
    Ts, D, se, vols, bounds, Ds, Ds_se = [], [], [], [], [], [], []
    for traj, a in zip(trajs, assessments):
        est = a.diffusion
        if not est.has_value:
            continue
        if est.is_upper_bound:
            bounds.append((traj.temperature_K, est.D_cm2_per_s))
            continue
        Ts.append(traj.temperature_K)
        D.append(est.D_cm2_per_s)
        se.append(est.D_stderr_cm2_per_s)
        vols.append(traj.mean_volume_A3)
        Ds.append(est.D_sigma_cm2_per_s)
        Ds_se.append(est.D_sigma_stderr_cm2_per_s)
    n_ions = trajs[0].count(args.mobile)
    extra = {}
    if Ds and all(x == x for x in Ds + Ds_se):
        extra = {"D_sigma_cm2_per_s": Ds, "D_sigma_stderr_cm2_per_s": Ds_se}
    summary = summarize_candidate(
        args.name, Ts, D, se, n_ions=n_ions,
        volumes_A3=vols if vols else min(t.mean_volume_A3 for t in trajs),
        charge=args.charge, species=args.mobile, haven_ratio=args.haven_ratio,
        upper_bounds=bounds or None, target_K=args.target,
        tiers=ConductivityTiers(tuple(args.tiers)) if args.tiers else ConductivityTiers(),
        volume_method=args.volume, route=args.route, **extra)
    if args.plot:
        from ..report.plots import arrhenius_figure, save_figure

        save_figure(arrhenius_figure(summary), args.plot)
    if args.report:
        from ..report.campaign_report import write_candidate_report

        write_candidate_report(args.report, args.name, summary,
                               list(zip(args.runs, trajs, assessments)))
    if args.json:
        print_json({"name": args.name, "runs": [{"input": os.path.abspath(p), "assessment": a}
                                                 for p, a in zip(args.runs, assessments)],
                    "summary": summary})
    else:
        print(candidate_text(summary, [(p, a) for p, a in zip(args.runs, assessments)]))
    return 1 if any(a.verdict == VERDICTS[-1] for a in assessments) else 0
