"""Options shared by several commands, defined once, and their parsing."""

from __future__ import annotations

import argparse
import math
import os
import sys
from contextlib import contextmanager, nullcontext
from dataclasses import dataclass
from typing import Callable, Sequence

from .. import __version__
from ..checks import FLAG_Z
from ..engine import DEFAULT_CHUNK
from ..errors import OptionError
from ..output import (
    FEATURE_EXTENSIONS,
    FORMATS,
    TEXT_EXTENSIONS,
    Column,
    OutputBatch,
    check_output_paths,
    convert_rows,
    csv_metadata,
    field_units,
    metadata_path,
    record_types,
    render,
    value_type,
    wrap,
    write_json,
    write_text,
)
from ..parallel import usable_cores
from ..project import DEFAULT_DENSIFY_M
from ..samplers import SAMPLERS
from ..stopping import DEFAULT_MAX_POINTS, DEFAULT_POINTS, POINT_CAP, StopRule
from ..runinfo import file_digests, utc_now, versions
from ..units import AREA_UNITS, DISTANCE_UNITS, area_factor, parse_distance
from ..vector import Attributes, vector_driver, write_features
from ..zones import DEFAULT_VERTICES, MAX_CIRCLE_VERTICES, read_zones

__all__ = [
    "Parser",
    "add_layer_options",
    "layer_options",
    "input_flags",
    "distance",
    "header_lines",
    "plane_lines",
    "caveat",
    "CAUTION",
    "add_plane_options",
    "add_output_options",
    "positive_int",
    "positive_float",
    "parse_tolerance",
    "emit",
    "Attributes",
    "add_zone_options",
    "add_sampling_options",
    "add_worker_options",
    "stop_rule",
    "run_metadata",
    "zone_layer",
    "FLAGS",
    "flags",
    "flag_names",
    "Screen",
    "Outcome",
    "show_outcome",
    "add_plot_option",
    "write_plot",
    "write_feature_rows",
    "flag_line",
]

#: The option that feeds each library parameter, where its name is not simply ``--`` + the parameter.
FLAGS = {
    "densify_m": "--densify",
    "vertices": "--circle-vertices",
    "radius_m": "--radius",
    "ks": "--at-least",
    "exact_time_limit_s": "--exact-budget",
    "values": "--raster-values",
    "fmt": "--format",
    "time_s": "--time-limit",
    "encoding": "--input-encoding",
    "workers": "--workers",
    "crs": "--plane-crs",
    "radius_unit": "--radius-field-unit",
    "open_options": "--open-option",
}
_NAMES: list[dict[str, str]] = []


def _flag(param: str) -> str:
    return FLAGS.get(param, "--" + param.replace("_", "-"))


def flag_names(params: Sequence[str]) -> dict[str, str]:
    """The flag of each parameter, as the innermost :func:`flags` context says, else the default."""
    out = {}
    for param in params:
        for names in reversed(_NAMES):
            if param in names:
                out[param] = names[param]
                break
        else:
            out[param] = _flag(param)
    return out


@contextmanager
def flags(**names: str):
    """Within this block, library parameters are fed by these flags (``flags(id_field="--other-id-field")``).

    Errors raised inside keep the names of the innermost block they passed through.
    """
    _NAMES.append(names)
    try:
        yield
    except Exception as err:
        params = getattr(err, "params", ())
        if params and not hasattr(err, "flag_names"):
            err.flag_names = flag_names(params)
        raise
    finally:
        _NAMES.pop()


def describe(err_or_warning) -> str:
    """An areamc error or warning's message, with each parameter named by its flag."""
    params = getattr(err_or_warning, "params", ())
    if not params:
        return str(err_or_warning)
    names = getattr(err_or_warning, "flag_names", None) or flag_names(params)
    return err_or_warning.render(names)


@dataclass(frozen=True)
class Screen:
    """How a command shows its result: table columns, every field (for units), header and footer lines.

    `header(args, report, inputs)` and `footer(args, report, rows)` return lists of lines.
    """

    columns: tuple[Column, ...]
    fields: tuple[Column, ...]
    header: Callable[..., list[str]]
    footer: Callable[..., list[str]]


def flag_line(rows, what: str) -> str:
    """The footer sentence on flagged rows, shared by every command."""
    flagged = sum(bool(r.flagged) for r in rows)
    if flagged:
        return f"{flagged} row(s) flagged: more than {FLAG_Z:g} standard errors from the exact {what} (|z| > {FLAG_Z:g})"
    return f"no row flagged: every estimate within {FLAG_Z:g} standard errors of the exact {what}"


class Parser(argparse.ArgumentParser):
    """ArgumentParser whose usage errors are one line and exit status 2.

    Sub-command parsers take positionals and options in any order
    (``areamc overlap A.gpkg --layer zones B.gpkg``), by argparse's
    intermixed parsing, and ``--`` ends the options: every argument after it
    is a positional, even one that starts with ``-`` (``areamc area -- -n.gpkg``).
    """

    _intermixing = False
    _after_dashes: list[str] | None = None
    _passes = 0

    def parse_known_args(self, args=None, namespace=None):
        if self._subparsers is not None:
            return super().parse_known_args(args, namespace)
        if self._intermixing:
            # One of the two passes of argparse's intermixed parsing: options first, then positionals.
            # argparse loses a "--" between the passes, so what followed it is handed to the
            # positionals pass here, still behind a "--".
            self._passes += 1
            if self._passes == 2 and self._after_dashes is not None:
                args = [*args, "--", *self._after_dashes]
            return super().parse_known_args(args, namespace)
        args = list(sys.argv[1:] if args is None else args)
        after = None
        if "--" in args:
            cut = args.index("--")
            args, after = args[:cut], args[cut + 1:]
        self._intermixing, self._after_dashes, self._passes = True, after, 0
        try:
            namespace, extras = super().parse_known_intermixed_args(args, namespace)
        finally:
            self._intermixing, self._after_dashes = False, None
        if extras:  # named here, so that the message can say which of this command's options was meant
            self.error(f"unrecognized arguments: {' '.join(extras)}")
        return namespace, extras

    def error(self, message: str):  # noqa: D401 - argparse API
        command = self.prog.removeprefix("areamc").strip()
        message += self._input_hint(message)
        raise OptionError(f"{command}: {message}" if command else message)

    def _input_hint(self, message: str) -> str:
        """For ``--layer`` and its kin given to a command with several inputs, the options it has instead."""
        if not message.startswith("unrecognized arguments:"):
            return ""
        own = {flag for action in self._actions for flag in action.option_strings}
        hints = []
        for word in message.split(":", 1)[1].split():
            if not word.startswith("--"):
                continue
            instead = sorted(flag for flag in own if flag.endswith("-" + word[2:]) and flag != word)
            if instead:
                hints.append(f"{word} names no input here; use {' or '.join(instead)}")
        return f" ({'; '.join(hints)})" if hints else ""


def positive_int(text: str) -> int:
    """argparse type: a whole number > 0 (``1e6`` and ``1_000_000`` accepted)."""
    try:
        value = float(text.replace("_", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive whole number, got {text!r}") from None
    if not (math.isfinite(value) and value > 0 and value == int(value)):
        raise argparse.ArgumentTypeError(f"expected a positive whole number, got {text!r}")
    return int(value)


def whole_number(minimum: int):
    """argparse type factory: a whole number >= `minimum`."""

    def parse(text: str) -> int:
        try:
            value = int(text)
        except ValueError:
            value = None
        if value is None or value < minimum:
            raise argparse.ArgumentTypeError(f"expected a whole number of at least {minimum}, got {text!r}")
        return value

    return parse


non_negative_int = whole_number(0)


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


def parse_tolerance(text: str, scale: float = 1.0, below: float | None = None) -> tuple[float | None, float | None]:
    """Read ``--tolerance``: ``"0.5%"`` is relative, a bare number is absolute.

    The absolute value is multiplied by `scale` (m² per ``--units`` for areas)
    and, if `below` is given, must be less than it (1 for shares).
    Returns ``(absolute, relative_fraction)``, one of them None.
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
    if below is not None and value >= below:
        raise OptionError(f"--tolerance: an absolute tolerance must be below {below:g}, got {text!r}")
    return value * scale, None


#: What an absolute ``--tolerance`` is, per kind of estimate.
TOLERANCE_UNITS = {
    "area": "an area in --units",
    "share": "a share between 0 and 1",
    "count": "a count in the density's unit (e.g. persons)",
}


def add_sampling_options(parser: argparse.ArgumentParser, tolerance: str = "area", *, claim: bool = False,
                         samplers: str = "area") -> None:
    """Point budget, precision target, confidence, seed and chunking (shared by estimating commands).

    `tolerance` is what an absolute ``--tolerance`` is (:data:`TOLERANCE_UNITS`); `claim` whether
    the command has ``--claim``; `samplers` which samplers the command takes (``"area"``: all
    three, ``"uniform"``: only uniform).
    """
    parser.add_argument("--points", "-n", type=positive_int, metavar="N",
                        help=f"points thrown into each estimate's sampling box (default {DEFAULT_POINTS:,})")
    parser.add_argument("--tolerance", "-t", metavar="TOL",
                        help=f"precision target: an interval half-width of at most TOL ({TOLERANCE_UNITS[tolerance]}, "
                        "or a percentage of the estimate such as 0.5%%), reached by a pilot and then a fresh "
                        "final batch")
    parser.add_argument("--max-points", type=positive_int, default=DEFAULT_MAX_POINTS, metavar="N",
                        help=f"cap on points per estimate with --tolerance (default {DEFAULT_MAX_POINTS:,})")
    parser.add_argument("--confidence", "-c", type=confidence_level, default=0.95, metavar="LEVEL",
                        help="confidence level of the intervals, in (0, 1) (default 0.95)")
    parser.add_argument("--seed", "-s", type=non_negative_int, metavar="INT",
                        help="seed for reproducible runs (default: fresh, recorded in the output)")
    stops = "a --tolerance or --claim run" if claim else "a --tolerance run"
    parser.add_argument("--chunk", type=positive_int, default=DEFAULT_CHUNK, metavar="N",
                        help=f"points drawn at a time, which bounds memory; results with --points do not depend "
                        f"on it, while {stops} stops only at chunk ends (default {DEFAULT_CHUNK:,})")
    if samplers == "area":
        sampler_help = ("how points are drawn: uniform (default), sobol (scrambled Sobol points) or stratified "
                        "(grid cells wholly inside counted exactly, points only where an edge passes); the last "
                        "two give Student-t intervals")
    else:
        sampler_help = "how points are drawn: uniform only in this command (sobol and stratified are refused)"
    parser.add_argument("--sampler", choices=sorted(SAMPLERS), default="uniform", help=sampler_help)
    parser.add_argument("--point-cap", type=positive_int, default=POINT_CAP, metavar="N",
                        help=f"refuse --points or --max-points above N per estimate (default {POINT_CAP:,}); "
                        "raise it knowingly for very long runs")
    parser.add_argument("--time-limit", type=positive_float, metavar="SECONDS",
                        help="stop each estimate at the first chunk end past this many seconds "
                        "(the result then depends on the machine's speed, not only on the seed)")


def add_worker_options(parser: argparse.ArgumentParser) -> None:
    """``--workers``: worker processes the job's estimates are shared among (parameter ``workers``)."""
    parser.add_argument("--workers", type=positive_int, metavar="N",
                        help=f"worker processes to share the regions, zones or pairs among (default: every usable "
                        f"core, {usable_cores()} here); results are identical for any N")


def stop_rule(args, *, scale: float | None = None, below: float | None = None) -> StopRule:
    """Build the stop rule from ``--points`` / ``--tolerance`` / ``--max-points``.

    An absolute ``--tolerance`` is multiplied by `scale` (default: m² per
    ``--units``, for areas); pass ``scale=1`` for counts or shares, and
    ``below=1`` for shares.
    """
    if args.tolerance is None:
        return StopRule(points=args.points or DEFAULT_POINTS, max_points=args.max_points, time_s=args.time_limit,
                        point_cap=args.point_cap)
    if args.points is not None:
        raise OptionError("--points and --tolerance exclude each other; give one")
    absolute, relative = parse_tolerance(args.tolerance, area_factor(args.units) if scale is None else scale, below)
    return StopRule(points=None, absolute=absolute, relative=relative, max_points=args.max_points,
                    time_s=args.time_limit, point_cap=args.point_cap)


def add_layer_options(parser: argparse.ArgumentParser, *, prefix: str = "", what: str = "FILE",
                      first: bool = True) -> None:
    """``--[PREFIX]layer``, ``--[PREFIX]id-field``, ``--[PREFIX]input-crs``, ``--[PREFIX]input-encoding``
    and ``--[PREFIX]open-option`` for the input file `what`.

    A command with one input file uses no prefix; a command with several names each input's
    options after it (``--regions-layer``, ``--zones-layer``, ``--other-layer``).  With `first`,
    also ``--allow-duplicate-ids``, which applies to every input of the command.
    """
    parser.add_argument(f"--{prefix}layer", metavar="NAME",
                        help=f"layer of {what} to read, for files with several layers (default: the first, "
                        "with a note naming it)")
    parser.add_argument(f"--{prefix}id-field", metavar="FIELD",
                        help=f"attribute of {what} whose values label its features in the results "
                        "(default: the feature id; areamc inspect lists the attributes)")
    parser.add_argument(f"--{prefix}input-crs", metavar="CRS",
                        help=f"CRS to read {what}'s coordinates in (EPSG code, PROJ string or WKT): needed when "
                        "the file declares none; one that differs from a declared CRS overrides it, with a warning")
    parser.add_argument(f"--{prefix}input-encoding", metavar="NAME",
                        help=f"text encoding of {what}'s attributes, such as latin-1, when the file declares "
                        "a wrong one (default: the file's own, e.g. a Shapefile's .cpg)")
    parser.add_argument(f"--{prefix}open-option", action="append", metavar="KEY=VALUE",
                        help=f"a GDAL open option of {what}'s driver, repeated for several: for a CSV of points, "
                        "X_POSSIBLE_NAMES=lon and Y_POSSIBLE_NAMES=lat (its coordinate columns), or "
                        "GEOM_POSSIBLE_NAMES=wkt (a column of WKT)")
    if first:
        parser.add_argument("--allow-duplicate-ids", action="store_true",
                            help="accept features that share an id (refused by default, since such rows cannot "
                            "be joined back by id); rows then tell them apart by feature_index, their position "
                            "in the layer")


def layer_options(args, prefix: str = "") -> dict:
    """The :func:`~areamc.load.read_layer` keywords given by the layer options of `prefix`
    (``""``, ``"regions_"``, ``"zones_"``, ``"other_"``)."""
    return {
        "layer": getattr(args, f"{prefix}layer"),
        "id_field": getattr(args, f"{prefix}id_field"),
        "input_crs": getattr(args, f"{prefix}input_crs"),
        "encoding": getattr(args, f"{prefix}input_encoding"),
        "open_options": getattr(args, f"{prefix}open_option", None),
        "allow_duplicate_ids": getattr(args, "allow_duplicate_ids", False),
    }


def input_flags(prefix: str):
    """The :func:`flags` block naming the layer options of input `prefix` (``"zones_"``) in errors."""
    dash = prefix.replace("_", "-")
    return flags(layer=f"--{dash}layer", id_field=f"--{dash}id-field", input_crs=f"--{dash}input-crs",
                 encoding=f"--{dash}input-encoding", open_options=f"--{dash}open-option")


def distance(text: str) -> float:
    """argparse type: a distance with a unit (``1km``, ``500m``, ``2mi``; a bare number is metres), in metres."""
    try:
        return parse_distance(text, param="distance")
    except OptionError:
        raise argparse.ArgumentTypeError(f"expected a positive distance with a unit (m, km or mi) such as 1km or "
                                         f"500m, got {text!r}") from None


def add_plane_options(parser: argparse.ArgumentParser) -> None:
    """``--plane-crs`` (parameter ``crs``) and ``--densify``."""
    parser.add_argument("--plane-crs", dest="crs", metavar="CRS",
                        help="the equal-area plane to compute in (EPSG code, PROJ string or WKT; refused unless "
                        "its area distortion over the data is below 1e-6). It does not change how the inputs "
                        "are read or how results are written (default: a Lambert azimuthal equal-area plane "
                        "centred on the data)")
    parser.add_argument("--densify", type=distance, default=DEFAULT_DENSIFY_M, metavar="DISTANCE",
                        help=f"longest edge before reprojection, with a unit: 1km, 500m (a bare number is "
                        f"metres; default {DEFAULT_DENSIFY_M / 1000:g}km)")


#: Default area unit of every command's output: districts and zones read best in km2.
DEFAULT_UNITS = "km2"


def add_output_options(parser: argparse.ArgumentParser, *, units: str = "areas", features: bool = True,
                       progress: bool = False) -> None:
    """``--format``, ``--output``, ``--units``, ``--quiet`` and ``--verbose``.

    `units` says what ``--units`` applies to (``"areas"``, or ``"density"`` for integrate's mean
    density); `features` whether ``--output`` also takes .gpkg and .geojson; `progress` whether the
    command shows a progress bar (area, overlap, coverage, integrate), which ``--quiet`` then hides too.
    """
    kinds = (".csv (with a NAME.csv-metadata.json file of units and run metadata), .json, or .txt or no "
             "extension for text")
    if features:
        kinds += "; .gpkg, .geojson, .shp or .fgb for the features with their results"
    parser.add_argument("--format", choices=FORMATS,
                        help="output format: table, csv or json (default: from --output's extension, else table); "
                        "with --output it must agree with a .csv or .json extension")
    parser.add_argument("--output", "-o", metavar="PATH",
                        help=f"write the results to this file instead of the terminal ({kinds}; any other "
                        "extension is refused)")
    applies = ("unit of the mean density (counts per UNIT)" if units == "density"
               else "unit of the areas in the output")
    parser.add_argument("--units", default=DEFAULT_UNITS, choices=list(AREA_UNITS),
                        help=f"{applies}: {', '.join(AREA_UNITS)} (default {DEFAULT_UNITS})")
    parser.add_argument("--quiet", "-q", action="store_true",
                        help=("no progress bar on the terminal and " if progress else "")
                        + "no notes (such as which layer of a file was read); warnings are still shown")
    parser.add_argument("--verbose", "-v", action="store_true", help="show the traceback of an error")


def plane_lines(plane) -> list[str]:
    """The header lines that name the equal-area plane (its label on a line of its own)."""
    how = "chosen from the data" if plane.chosen else "as given by --plane-crs"
    return [f"plane ({how}; area distortion {plane.distortion:.1g} over the data):", f"  {plane.label}"]


def header_lines(command: str, sources: str, run, method: str, units: str) -> list[str]:
    """The header every command's table starts with: what was read, the plane, the interval method,
    the seed and the units (one copy for all commands)."""
    return [*wrap(f"areamc {command}: {sources}"), *plane_lines(run.plane),
            *wrap(f"{run.confidence:.4g} {method}; seed {run.seed_entropy}; {units}"), ""]


#: The caution carried by results that could inform decisions on safety (README, "Caution").
CAUTION = ("estimates do not replace surveys, regulatory determinations or licensed professional practice, "
           "and local codes apply")


def caveat(*, reach: bool = False, claim: bool = False) -> str | None:
    """The one-line caution for results with reach circles or claim verdicts, else None."""
    parts = []
    if reach:
        parts.append("reach circles are straight-line (geodesic) distances, not travel routes or times")
    if claim:
        parts.append("each verdict is a statistical statement about these polygons, not a compliance "
                     "determination")
    if not parts:
        return None
    return "caution: " + "; ".join(parts + [CAUTION]) + "."


def run_metadata(args, **inputs) -> dict:
    """Metadata every result file starts with: tool, version, command, the inputs, the clock and
    the versions of the libraries (:func:`~areamc.runinfo.versions`).

    Each keyword is an output key (``input=layer`` or ``inputs=[layers]``); a layer is described
    by path, layer name, CRS, number of features kept and ``files``, the SHA-256 of each of its
    files (:func:`~areamc.runinfo.file_digests`).  ``started`` is when the run began (noted by
    :func:`check_outputs`, the first step of every command), ``finished`` when this is called,
    after the job: both ISO 8601 in UTC.
    """
    def describe(layer) -> dict:
        return {"path": layer.path, "layer": layer.layer, "crs": layer.crs.to_string(), "features": len(layer),
                "files": file_digests(layer.path, layer.layer)}

    out = {"tool": "areamc", "version": __version__, "command": " ".join(args.argv)}
    for key, value in inputs.items():
        out[key] = [describe(v) for v in value] if isinstance(value, (list, tuple)) else describe(value)
    out["started"] = getattr(args, "started", None) or utc_now()
    out["finished"] = utc_now()
    out["versions"] = dict(versions())
    return out


def _extension(path: str) -> str:
    """The extension of `path`'s file name, in lower case (``""`` for none)."""
    return os.path.splitext(os.path.basename(path.rstrip("/")))[1].lower()


_TEXT_KINDS = ".csv, .json, .txt or no extension"
_FEATURE_KINDS = ", ".join(FEATURE_EXTENSIONS[:-1]) + " or " + FEATURE_EXTENSIONS[-1]


def check_format(args, *, features: bool = True) -> None:
    """Refuse, before any work, an ``--output`` extension areamc does not write (or, with
    `features` false, a feature extension), a ``--format`` that contradicts a ``.csv``/``.json``
    extension or comes with a feature extension, a ``--trace`` path not ending in ``.csv`` and a
    ``--plot`` path not ending in ``.png``."""
    path = args.output
    if path:
        ext = _extension(path)
        if ext in FEATURE_EXTENSIONS:
            if not features:
                raise OptionError(f"--output {path}: this command writes no features; give {_TEXT_KINDS}")
            if args.format:
                raise OptionError(f"--format {args.format}: --output {path} writes features; drop --format, or give "
                                  f"{_TEXT_KINDS}")
        elif ext not in TEXT_EXTENSIONS:
            also = f", or {_FEATURE_KINDS} for features" if features else ""
            raise OptionError(f"--output {path}: areamc does not write {ext} files; give {_TEXT_KINDS} for the "
                              f"results as text{also}")
        elif TEXT_EXTENSIONS[ext] and args.format and args.format != TEXT_EXTENSIONS[ext]:
            raise OptionError(f"--format {args.format}: --output {path} ends in {ext}, which holds "
                              f"{TEXT_EXTENSIONS[ext]}; drop --format, or give .{args.format} or .txt")
    trace = getattr(args, "trace", None)
    if trace and _extension(trace) != ".csv":
        raise OptionError(f"--trace {trace}: the trace is CSV; give a path ending in .csv")
    plot = getattr(args, "plot", None)
    if plot and _extension(plot) != ".png":
        raise OptionError(f"--plot {plot}: the picture is PNG; give a path ending in .png")


def output_format(args) -> str:
    """The text format asked for, or the one the ``--output`` extension implies (``.csv``, ``.json``;
    a table for ``.txt``, no extension or stdout)."""
    if args.format:
        return args.format
    if args.output:
        return TEXT_EXTENSIONS.get(_extension(args.output)) or "table"
    return "table"


def add_zone_options(parser: argparse.ArgumentParser) -> None:
    """``--radius``, ``--radius-field``, ``--circle-vertices`` for zones given as points."""
    parser.add_argument("--radius", metavar="DISTANCE",
                        help="reach of every facility point in the zone file, with a unit: 5km, 800m, 3mi (a bare "
                        "number is metres); each point becomes a geodesic circle of that straight-line radius")
    parser.add_argument("--radius-field", metavar="FIELD",
                        help="attribute of the zone file holding each facility point's reach, in --radius-field-unit")
    parser.add_argument("--radius-field-unit", choices=sorted(DISTANCE_UNITS), default="m", dest="radius_unit",
                        help="unit of the --radius-field values: m, km or mi (default m)")
    parser.add_argument("--circle-vertices", type=positive_int, default=DEFAULT_VERTICES, metavar="N",
                        help=f"vertices of each geodesic circle (default {DEFAULT_VERTICES})")
    parser.add_argument("--vertex-cap", type=positive_int, default=MAX_CIRCLE_VERTICES, metavar="N",
                        help=f"refuse --circle-vertices above N (default {MAX_CIRCLE_VERTICES:,}); raise it knowingly")


def zone_layer(args, path: str, **options):
    """Read a zone layer with the zone options of `args` (points become geodesic circles) and the
    layer `options` of :func:`layer_options`."""
    radius = parse_distance(args.radius) if args.radius is not None else None
    return read_zones(path, radius_m=radius, radius_field=args.radius_field, vertices=args.circle_vertices,
                      vertex_cap=args.vertex_cap, radius_unit=args.radius_unit, **options)


@dataclass(frozen=True)
class Outcome:
    """What a command computed, before anything is written (its ``compute(args)``; ``show(args,
    outcome)`` writes it).

    Attributes
    ----------
    report : object
        The library's report (``AreaReport``, ``OverlapReport``, ``CoverageReport``, ``IntegrateReport``).
    rows : list of dict
        The rows as the JSON output holds them before unit conversion: areas in m² of the plane.
    metadata : dict
        The run's metadata (the JSON output's keys without ``results``), areas in m².
    screen : Screen
        The command's screen (columns, every field for units, header and footer).
    columns : tuple of Column or None
        The table's columns when they differ from the screen's (``--wide``, ``--claim``).
    features : tuple or None
        ``(geometries, crs, layer_name, attributes)`` for a feature output: shapely geometries in
        the input layer's CRS (None when the command was not asked for them), its pyproj CRS, the
        layer name and the :class:`~areamc.vector.Attributes` each feature carries.
    layers : tuple
        The projected layers the job ran on (plane metres; for maps).
    inputs : object
        What the screen's header is given (the layer, or a tuple of layers and the density spec).
    status : int
        The command's exit status (coverage's ``--fail-on-shortfall``: 1 or 3), else 0.
    """

    report: object
    rows: list
    metadata: dict
    screen: Screen
    columns: tuple | None = None
    features: tuple | None = None
    layers: tuple = ()
    inputs: object = None
    status: int = 0


#: What ``--plot FILE.png`` draws, per command.
PLOTS = {
    "area": "each feature's running estimate with its interval and the exact area (without a trace, as "
            "with --sampler sobol or stratified, the final estimates against the exact areas)",
    "integrate": "each region's total with its interval against the exact total",
    "coverage": "a map of the regions shaded by the share covered by at least the smallest --at-least, "
                "with the zones outlined",
    "overlap": "the multiplicity profile: area covered by exactly k zones, with intervals",
}


def add_plot_option(parser: argparse.ArgumentParser, command: str) -> None:
    """``--plot FILE.png``: also draw the command's picture (:data:`PLOTS`) into a PNG file."""
    parser.add_argument("--plot", metavar="FILE.png",
                        help=f"also draw {PLOTS[command]} into this PNG file")


def write_plot(args, outcome: Outcome, *, batch=None) -> None:
    """With ``--plot``, draw the command's picture of `outcome` (:func:`areamc.report.command_picture`;
    the command is the report's job) and write it atomically (in `batch`, when given)."""
    if not getattr(args, "plot", None):
        return
    from ..report import command_picture, write_png

    write_png(command_picture(outcome.report.run.job, outcome, units=args.units).png, args.plot, batch=batch)


def show_outcome(args, outcome: Outcome, *, batch=None) -> None:
    """Render and write a command's :class:`Outcome` per the output options (see :func:`show`), and
    its ``--plot`` picture (:func:`write_plot`): the files are renamed into place together."""
    with nullcontext(batch) if batch is not None else OutputBatch() as files:
        write_plot(args, outcome, batch=files)
        show(args, outcome.screen, outcome.report, outcome.rows, outcome.metadata, inputs=outcome.inputs,
             features=outcome.features, columns=outcome.columns, batch=files)


def show(args, screen: Screen, report, rows, metadata, *, inputs=None, features=None, columns=None,
         batch=None) -> None:
    """Render a report through its command's :class:`Screen` and write it (see :func:`emit`)."""
    header = screen.header(args, report, inputs)
    footer = screen.footer(args, report, rows)
    columns = with_feature_index(args, columns or screen.columns)
    emit(args, rows, columns, metadata, header, footer, features=features, fields=screen.fields,
         batch=batch, types=report_types(report))


def report_types(report, which: str = "rows") -> dict[str, str]:
    """The type of every field of a report's table (:func:`~areamc.output.record_types` of its row
    records, :data:`areamc.frames.TABLES`); empty for anything else."""
    from ..frames import TABLES

    for known, tables in TABLES.items():
        if isinstance(report, known) and which in tables:
            table = tables[which]
            return record_types(table.record, *(part for _, part in table.nested))
    return {}


def with_feature_index(args, columns):
    """With ``--allow-duplicate-ids``, the table also shows each row's feature position, after its id column(s)."""
    if not getattr(args, "allow_duplicate_ids", False):
        return columns
    out, last_id = list(columns), None
    for n, column in enumerate(out):
        if column.field in ("id", "id_a", "id_b"):
            last_id = n
    if last_id is None:
        return columns
    extra = [Column("feature_index")] if out[last_id].field == "id" else [
        Column("feature_index_a"), Column("feature_index_b")]
    return tuple(out[:last_id + 1] + extra + out[last_id + 1:])


def emit(args, rows, columns, metadata, header=(), footer=(), features=None, fields=None, batch=None,
         types=None, path=None) -> None:
    """Render rows per the output options and write them to ``--output`` (or `path`) or stdout.

    `columns` are the table's; `fields` (default `columns`) name every area or
    per-area field, for unit conversion in CSV, JSON and feature output.
    `features` is ``(geometries, crs, layer_name)`` or ``(geometries, crs, layer_name,
    attributes)`` (:class:`~areamc.vector.Attributes` of the inputs whose attributes each feature
    carries) for a feature ``--output`` (.gpkg, .geojson, .shp, .fgb).  `types` gives each field's
    type (:func:`report_types`); a field it does not name is typed by its values.  A CSV file gets
    its CSVW sidecar (:func:`~areamc.output.csv_metadata`) in the same batch.  With `batch` (an
    :class:`~areamc.output.OutputBatch`), the files are renamed into place together with the
    batch's other files.
    """
    fields = columns if fields is None else fields
    path = args.output if path is None else path
    types = dict(types or {})
    metadata = _with_density_digests(metadata)
    if vector_driver(path):
        if features is None:
            raise OptionError(f"--output {path}: this command writes no features; give {_TEXT_KINDS}")
        write_feature_rows(path, rows, fields, args.units, metadata, features, types=types, batch=batch)
        return
    fmt = output_format(args) if path == args.output else "csv"
    if fmt != "table":
        columns = fields
    text = render(rows, columns, fmt=fmt, units=args.units, metadata=metadata, header=header,
                  footer=footer, fields=fields)
    if not path:
        sys.stdout.write(text)
        return
    with nullcontext(batch) if batch is not None else OutputBatch() as files:
        write_text(text, path, batch=files)
        if fmt == "csv":
            names = list(rows[0]) if rows else [c.field for c in columns]
            kinds = {n: types.get(n) or value_type(r.get(n) for r in rows) for n in names}
            units_of = field_units(names, fields, args.units, metadata.get("job"))
            write_json(csv_metadata(path, names, kinds, units_of, {**metadata, "units": args.units}),
                       metadata_path(path), batch=files, owner=path)


def write_feature_rows(path: str, rows, fields, units: str, metadata: dict, features, *, types=None, batch=None,
                       staged: bool = False) -> None:
    """Write `rows` (areas in m²) as features: converted to `units` by `fields`, each field's unit, the
    caution as the layer's description and the run's metadata (:func:`~areamc.vector.write_features`).

    `features` is ``(geometries, crs, layer_name[, attributes])`` (see :func:`emit`); with `staged`,
    `path` is a temporary GeoPackage the caller staged, and the layer is added to it (one file of
    several layers).
    """
    geoms, crs, layer, *more = features
    converted = convert_rows(rows, fields, units)
    names = list(converted[0]) if converted else []
    write_features(path, geoms, converted, crs, layer, batch=batch, description=metadata.get("caveat"),
                   attributes=more[0] if more else (), types=dict(types or {}),
                   units_of=field_units(names, fields, units, metadata.get("job")),
                   metadata={**metadata, "units": units}, staged=staged)


def _with_density_digests(metadata: dict) -> dict:
    """`metadata` with the SHA-256 of the density file(s) (``density.files``) when the density is a file."""
    density = metadata.get("density")
    if not isinstance(density, dict) or "files" in density:
        return metadata
    source = density.get("source")
    if not isinstance(source, str) or not os.path.exists(source):
        return metadata
    return {**metadata, "density": {**density, "files": file_digests(source, density.get("layer"))}}


#: The options that name output files, by parameter (``--output``, ``--trace``, ``--plot``).
OUTPUT_PARAMS = ("output", "trace", "plot")


def check_outputs(args, inputs, *, features: bool = True, **others: str | None) -> None:
    """Check ``--output`` and the other output paths (``trace=args.trace``) before doing any work,
    and note the time the run started (``args.started``, for :func:`run_metadata`).

    Each must be a writable file in an existing, writable folder; none may be one of `inputs`
    (every input file the command reads, None entries skipped) or an input's sidecar, by real
    path; and no two outputs may share a path (see :func:`~areamc.output.check_output_paths`),
    each file an output makes included (a CSV's metadata sidecar, a Shapefile's parts).  Then the
    extensions and ``--format`` must agree (:func:`check_format`; `features` false for a command
    that writes no features).
    """
    if not getattr(args, "started", None):
        args.started = utc_now()
    check_output_paths({"output": args.output, **others}, inputs)
    check_format(args, features=features)


def density_file(args) -> str | None:
    """``--density`` when it names a file (blocks or a raster), else None (an expression or no density)."""
    text = getattr(args, "density", None)
    if not text or getattr(args, "density_kind", "auto") == "expression" or not os.path.exists(text):
        return None
    return text
