"""The ``areamc`` command line: a thin layer that parses, calls the library, and formats.

Each command lives in its own module with ``add_parser(subparsers)`` and
``run(args) -> int``.  Every :class:`~areamc.errors.InputError` becomes one
line on stderr and exit status 2, and so does an OSError (a full disk while
writing, a file that cannot be read), naming its path; a traceback appears
only with ``--verbose``.  SIGINT (Ctrl-C) ends a run with exit status 130 and
SIGTERM with 143; both go through the atomic writers' clean-up, so neither
leaves a temporary or partial file.
"""

from __future__ import annotations

import signal
import sys
import warnings
from contextlib import contextmanager

from .. import __version__
from ..errors import AreamcError, AreamcNotice, AreamcWarning
from . import area, audit, coverage, inspect, integrate, overlap
from .common import OUTPUT_PARAMS, Parser, describe, flag_names

__all__ = ["main", "build_parser"]

COMMANDS = (area, overlap, coverage, integrate, inspect, audit)

#: Exit statuses of a run ended by a signal: 128 + the signal number (common practice of POSIX shells).
EXIT_SIGINT = 128 + signal.SIGINT
EXIT_SIGTERM = 128 + signal.SIGTERM


class Terminated(BaseException):
    """Raised in the main thread when SIGTERM arrives, so that every ``except BaseException``
    clean-up (the atomic writers') runs as it does for KeyboardInterrupt."""


def _raise_terminated(signum, frame):
    raise Terminated


@contextmanager
def _sigterm_raises():
    """Within this block SIGTERM raises :class:`Terminated`; the previous handler is restored after."""
    try:
        previous = signal.signal(signal.SIGTERM, _raise_terminated)
    except ValueError:  # not the main thread: leave signals alone
        previous = None
    try:
        yield
    finally:
        if previous is not None:
            signal.signal(signal.SIGTERM, previous)


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
    prefix = ("note" if issubclass(category, AreamcNotice) else "warning" if issubclass(category, AreamcWarning)
              else f"warning ({category.__name__})")
    print(f"areamc: {prefix}: {text}", file=sys.stderr)


def main(argv: list[str] | None = None) -> int:
    """Run the command line; returns the exit status."""
    argv = sys.argv[1:] if argv is None else list(argv)
    options = argv[: argv.index("--")] if "--" in argv else argv  # after "--" every argument is a file
    verbose = "--verbose" in options or "-v" in options
    quiet = "--quiet" in options or "-q" in options
    with warnings.catch_warnings():
        warnings.showwarning = _show_warning
        if not verbose:
            # other libraries' warnings are for developers; areamc's own always show
            warnings.filterwarnings("ignore")
            warnings.filterwarnings("always", category=AreamcWarning)
        if quiet:
            warnings.filterwarnings("ignore", category=AreamcNotice)
        with _sigterm_raises():
            return _run(argv, verbose)


def _os_error_line(err: OSError, args) -> str:
    """One line for an OSError: the option and path at fault (``--output out.csv: cannot write: ...``)."""
    reason = err.strerror or str(err)
    if err.filename is None:
        return reason
    path = str(err.filename)
    names = flag_names(OUTPUT_PARAMS)
    for param in OUTPUT_PARAMS:
        if args is not None and getattr(args, param, None) == path:
            return f"{names[param]} {path}: {reason}"
    return f"{path}: {reason}"


def _run(argv: list[str], verbose: bool) -> int:
    args = None
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
        return EXIT_SIGINT
    except Terminated:
        print("areamc: terminated", file=sys.stderr)
        return EXIT_SIGTERM
    except BrokenPipeError:
        return 0
    except OSError as err:
        if verbose:
            raise
        print(f"areamc: error: {' '.join(_os_error_line(err, args).split())}", file=sys.stderr)
        return 2
