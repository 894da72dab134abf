"""Options shared by several commands, defined once, and their parsing."""

from __future__ import annotations

import argparse
import math
import sys

from ..errors import OptionError
from ..output import FORMATS, check_output_path, render, write_text
from ..project import DEFAULT_DENSIFY_M
from ..units import AREA_UNITS, area_factor

__all__ = [
    "Parser",
    "add_layer_options",
    "add_plane_options",
    "add_output_options",
    "positive_int",
    "positive_float",
    "parse_tolerance",
    "emit",
]


class Parser(argparse.ArgumentParser):
    """ArgumentParser whose usage errors are one line and exit status 2."""

    def error(self, message: str):  # noqa: D401 - argparse API
        raise OptionError(f"{self.prog}: {message}")


def positive_int(text: str) -> int:
    """argparse type: a whole number > 0 (``1e6`` and ``1_000_000`` accepted)."""
    try:
        value = float(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive whole number, got {text!r}") from None
    if not (math.isfinite(value) and value > 0 and value == int(value)):
        raise argparse.ArgumentTypeError(f"expected a positive whole number, got {text!r}")
    return int(value)


def non_negative_int(text: str) -> int:
    """argparse type: a whole number >= 0."""
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a non-negative whole number, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a non-negative whole number, got {text!r}")
    return value


def positive_float(text: str) -> float:
    """argparse type: a finite number > 0."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return value


def confidence_level(text: str) -> float:
    """argparse type: a number strictly between 0 and 1."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number in (0, 1), got {text!r}") from None
    if not 0.0 < value < 1.0:
        raise argparse.ArgumentTypeError(f"must lie strictly between 0 and 1, got {text!r}")
    return value


def parse_tolerance(text: str, units: str) -> tuple[float | None, float | None]:
    """Read ``--tolerance``: ``"0.5%"`` is relative, a bare number is absolute in `units`.

    Returns ``(absolute_m2, relative_fraction)``, one of them None.
    """
    raw = text.strip()
    relative = raw.endswith("%")
    number = raw[:-1] if relative else raw
    try:
        value = float(number)
    except ValueError:
        raise OptionError(f"--tolerance: expected a number or a percentage such as 0.5%, got {text!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise OptionError(f"--tolerance: must be positive, got {text!r}")
    if relative:
        if value >= 100:
            raise OptionError(f"--tolerance: a relative tolerance must be below 100%, got {text!r}")
        return None, value / 100
    return value * area_factor(units), None


def add_layer_options(parser: argparse.ArgumentParser, *, prefix: str = "", what: str = "the layer") -> None:
    """``--layer``, ``--id-field`` and ``--input-crs`` for one input file."""
    parser.add_argument(f"--{prefix}layer", metavar="NAME", help=f"layer of {what}, for files with several layers (default: the first)")
    parser.add_argument(f"--{prefix}id-field", metavar="FIELD", help="attribute that labels features (default: the feature id)")
    parser.add_argument(f"--{prefix}input-crs", metavar="CRS", help="CRS to assume when the file declares none (EPSG code, PROJ string or WKT)")


def add_plane_options(parser: argparse.ArgumentParser) -> None:
    """``--crs`` and ``--densify``."""
    parser.add_argument("--crs", metavar="CRS", help="equal-area plane to compute in (EPSG code, PROJ string or WKT); default: chosen from the data's extent")
    parser.add_argument("--densify", type=positive_float, default=DEFAULT_DENSIFY_M, metavar="METRES",
                        help=f"longest edge, in metres, before reprojection (default {DEFAULT_DENSIFY_M:g})")


def add_output_options(parser: argparse.ArgumentParser) -> None:
    """``--format``, ``--output``, ``--units``, ``--quiet``, ``--verbose``."""
    parser.add_argument("--format", choices=FORMATS, help="output format (default: from --output's extension, else table)")
    parser.add_argument("--output", "-o", metavar="PATH", help="write results here instead of stdout")
    parser.add_argument("--units", default="m2", choices=list(AREA_UNITS), help="area unit of the output (default m2)")
    parser.add_argument("--quiet", "-q", action="store_true", help="no progress bar and no notes on stderr")
    parser.add_argument("--verbose", "-v", action="store_true", help="show tracebacks of errors")


def output_format(args) -> str:
    """The format asked for, or the one the ``--output`` extension implies."""
    if args.format:
        return args.format
    if args.output:
        ext = args.output.rsplit(".", 1)[-1].lower()
        if ext in ("csv", "json"):
            return ext
    return "table"


def emit(args, rows, columns, metadata, header=(), footer=()) -> None:
    """Render rows per the output options and write them to ``--output`` or stdout."""
    text = render(rows, columns, fmt=output_format(args), units=args.units, metadata=metadata, header=header, footer=footer)
    if args.output:
        write_text(text, args.output)
    else:
        sys.stdout.write(text)


def check_outputs(args, inputs, *extra: str | None) -> None:
    """Check ``--output`` and any other output paths before doing any work."""
    check_output_path(args.output, inputs)
    for path in extra:
        check_output_path(path, inputs)
