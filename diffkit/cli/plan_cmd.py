"""``diffkit plan``: how long to simulate, at which temperatures, for a target precision."""

from __future__ import annotations

import argparse

from .options import print_json, temperature_K, time_ps

EXAMPLE = """examples:
  diffkit plan --Ea 0.3 --D 1e-5 --at 900K --ions 24 --jump-distance 2.5 \\
      --temperatures 600,700,800,900,1000,1100 --target-error 30%
  diffkit plan --Ea 0.25 --prefactor 5e-4 --ions 48 --jump-distance 2.4 \\
      --temperatures 500:1200:100 --target-error 20% --volume 3200 --json

The plan uses the per-run precision model calibrated in diffkit.trust (relative error of D from the
effective number of hops) and propagates it through the weighted Arrhenius fit to the target
temperature. It assumes one mechanism, no phase change and an activation energy close to the
guess: treat it as a starting point and check the runs with 'diffkit inspect'."""


def temperature_list(text):
    """argparse type: ``600,700,800`` or ``500:1200:100`` (start:stop:step, inclusive) in K."""
    try:
        if ":" in text:
            a, b, step = (float(temperature_K(x)) for x in text.split(":"))
            n = int(round((b - a) / step)) + 1
            return [a + i * step for i in range(n)]
        return [temperature_K(x) for x in text.split(",") if x.strip()]
    except (ValueError, ZeroDivisionError, argparse.ArgumentTypeError) as exc:
        raise argparse.ArgumentTypeError(
            f"expected temperatures like 600,700,800 or 500:1200:100; got {text!r}") from exc


def add_parser(sub):
    from .inspect_cmd import percent

    p = sub.add_parser("plan", help="plan simulation lengths and temperatures for a target precision",
                       description="Estimate how long to simulate at which temperatures to reach "
                                   "a target relative error at the target temperature.",
                       epilog=EXAMPLE, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--Ea", type=float, required=True, metavar="EV",
                   help="expected activation energy, eV")
    g = p.add_mutually_exclusive_group(required=True)
    g.add_argument("--D", type=float, metavar="CM2_PER_S",
                   help="expected tracer D at the temperature --at, cm²/s")
    g.add_argument("--prefactor", type=float, metavar="CM2_PER_S",
                   help="expected Arrhenius prefactor D0, cm²/s")
    p.add_argument("--at", type=temperature_K, metavar="T", help="temperature of --D, e.g. 900K")
    p.add_argument("--ions", type=int, required=True, help="number of mobile ions in the cell")
    p.add_argument("--jump-distance", type=float, required=True, metavar="ANGSTROM",
                   help="jump distance between sites, Å")
    p.add_argument("--temperatures", type=temperature_list, required=True,
                   help="candidate temperatures, e.g. 600,700,800 or 500:1200:100")
    p.add_argument("--target-error", type=percent, required=True, metavar="FRACTION",
                   help="relative error wanted at the target temperature, e.g. 20%%")
    p.add_argument("--target", type=temperature_K, default=300.0, metavar="T",
                   help="target temperature (default 300K)")
    p.add_argument("--max-length", type=time_ps, metavar="TIME",
                   help="longest run you can afford, e.g. 2ns")
    p.add_argument("--volume", type=float, metavar="A3",
                   help="cell volume, Å³ (to show the σ band as well)")
    p.add_argument("--charge", type=float, default=1.0, help="charge of the mobile ion, e")
    p.add_argument("--haven-ratio", type=float, default=1.0, help="Haven ratio (default 1)")
    p.add_argument("--conservative", action="store_true",
                   help="use the published error-scaling constants (He et al. 2018, from "
                        "memory) instead of diffkit's calibration: longer, safer plans")
    p.add_argument("--json", action="store_true", help="print JSON (schema: docs/json_schema.md)")
    return p


def run(args):
    from ..errors import UsageError
    from ..planning import HE_2018_PRECISION, plan_campaign

    if args.D is not None and args.at is None:
        raise UsageError("--D needs --at, the temperature it belongs to (e.g. --at 900K)")
    plan = plan_campaign(
        Ea_eV=args.Ea, candidate_temperatures_K=args.temperatures, n_ions=args.ions,
        jump_distance_A=args.jump_distance, target_relative_error=args.target_error,
        D_cm2_per_s=args.D, at_temperature_K=args.at, D0_cm2_per_s=args.prefactor,
        target_temperature_K=args.target, max_length_ps=args.max_length,
        volume_A3=args.volume, charge=args.charge, haven_ratio=args.haven_ratio,
        precision=HE_2018_PRECISION if args.conservative else None)
    if args.json:
        print_json(plan)
    else:
        print(plan.to_text())
    return 0 if plan.reachable else 1
