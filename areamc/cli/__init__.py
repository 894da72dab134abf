"""The ``areamc`` command line: a thin layer that parses, calls the library, and formats.

Each command lives in its own module with ``add_parser(subparsers)`` and
``run(args) -> int``.  Every :class:`~areamc.errors.InputError` becomes one
line on stderr and exit status 2; a traceback appears only with ``--verbose``.
"""

from __future__ import annotations

import sys
import warnings

from .. import __version__
from ..errors import AreamcError, AreamcWarning
from . import area, coverage, inspect, integrate, overlap
from .common import Parser, describe

__all__ = ["main", "build_parser"]

COMMANDS = (area, overlap, coverage, integrate, inspect)


def build_parser() -> Parser:
    parser = Parser(
        prog="areamc",
        description="Monte Carlo areas of polygon layers, with confidence intervals "
        "and exact planar and geodesic checks.",
    )
    parser.add_argument("--version", action="version", version=f"areamc {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True
    for module in COMMANDS:
        module.add_parser(sub)
    return parser


def _show_warning(message, category, filename, lineno, file=None, line=None):
    text = " ".join(describe(message).split())
    prefix = "warning" if issubclass(category, AreamcWarning) else f"warning ({category.__name__})"
    print(f"areamc: {prefix}: {text}", file=sys.stderr)


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    argv = sys.argv[1:] if argv is None else list(argv)
    verbose = "--verbose" in argv or "-v" in argv
    with warnings.catch_warnings():
        warnings.showwarning = _show_warning
        if not verbose:
            # other libraries' warnings are for developers; areamc's own always show
            warnings.filterwarnings("ignore")
            warnings.filterwarnings("always", category=AreamcWarning)
        return _run(argv, verbose)


def _run(argv: list[str], verbose: bool) -> int:
    try:
        args = build_parser().parse_args(argv)
        args.argv = ["areamc", *argv]
        return int(args.run(args) or 0)
    except AreamcError as err:
        if verbose:
            raise
        print(f"areamc: error: {' '.join(describe(err).split())}", file=sys.stderr)
        return err.exit_status
    except KeyboardInterrupt:
        print("areamc: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0
