"""The ``diffkit`` command: parses arguments, calls the library, prints.

Exit codes: 0 done and nothing flagged; 1 done, but at least one run was judged
unreliable or failed; 2 stopped by a usage or input error (one line on stderr,
no traceback unless ``--traceback``).
"""

from __future__ import annotations

import argparse
import importlib
import sys

from ..errors import DiffkitError

__all__ = ["main", "EXIT_OK", "EXIT_FLAGGED", "EXIT_ERROR"]

EXIT_OK, EXIT_FLAGGED, EXIT_ERROR = 0, 1, 2

SUBCOMMANDS = ("ingest", "inspect", "arrhenius", "plan", "campaign", "demo")


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors and exit code 2."""

    def error(self, message):
        self.exit(EXIT_ERROR, f"{self.prog}: error: {message}\n")


def build_parser():
    """The argument parser with every subcommand registered."""
    from .. import __version__

    parser = _Parser(prog="diffkit",
                     description="Diffusion coefficients, Arrhenius fits and conductivities with "
                                 "honest uncertainties from MD of solid ion conductors.",
                     formatter_class=argparse.RawDescriptionHelpFormatter,
                     epilog="Run 'diffkit <subcommand> --help' for a worked example of each.")
    parser.add_argument("--version", action="version", version=f"diffkit {__version__}")
    parser.add_argument("--traceback", action="store_true",
                        help="show the full traceback on errors (for debugging)")
    sub = parser.add_subparsers(dest="command", metavar="SUBCOMMAND", parser_class=_Parser)
    for name in SUBCOMMANDS:
        try:
            mod = importlib.import_module(f"{__name__}.{name}_cmd")
        except ModuleNotFoundError as exc:  # a subcommand not built yet
            if exc.name != f"{__name__}.{name}_cmd":
                raise
            continue
        p = mod.add_parser(sub)
        p.set_defaults(_run=mod.run)
        p.add_argument("--traceback", action="store_true", default=argparse.SUPPRESS,
                       help="show the full traceback on errors")
    return parser


def main(argv=None):
    """Entry point of the ``diffkit`` console script; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return EXIT_ERROR
    try:
        code = args._run(args)
    except DiffkitError as exc:
        if getattr(args, "traceback", False):
            raise
        print(f"diffkit {args.command}: error: {exc}", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print("diffkit: interrupted", file=sys.stderr)
        return 130
    return EXIT_OK if code is None else int(code)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
