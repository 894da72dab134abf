"""The library speaks in parameters, the command line in flags; the command line holds no domain logic.

A notebook user never passed ``--seed``; so an error raised by a library call
names the parameter (``seed``), and the command line renders the same message
with its flag (``--seed``).  Checked two ways: statically, every string in a
``raise`` or ``warnings.warn`` of a library module is free of ``--flag``
text; and by calling the library with bad arguments.
"""

from __future__ import annotations

import ast
import pathlib
import re

import numpy as np
import pytest

import areamc
from areamc.errors import AreamcError, OptionError
from areamc.cli.common import describe
from conftest import run_cli

PACKAGE = pathlib.Path(areamc.__file__).parent
LIBRARY = sorted(p for p in PACKAGE.glob("*.py"))
CLI = sorted((PACKAGE / "cli").glob("*.py"))
FLAG = re.compile(r"--[a-z]")


def _message_strings(tree: ast.AST):
    """String pieces inside ``raise ...(...)`` and ``warnings.warn(...)`` / ``AreamcWarning(...)`` calls."""
    for node in ast.walk(tree):
        calls = []
        if isinstance(node, ast.Raise) and node.exc is not None:
            calls.append(node.exc)
        elif isinstance(node, ast.Call) and getattr(node.func, "attr", getattr(node.func, "id", "")) in ("warn", "AreamcWarning"):
            calls.append(node)
        for call in calls:
            for sub in ast.walk(call):
                if isinstance(sub, ast.Constant) and isinstance(sub.value, str):
                    yield sub.lineno, sub.value


@pytest.mark.parametrize("path", LIBRARY, ids=lambda p: p.name)
def test_library_module__messages__name_no_flags(path):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found = [(line, text) for line, text in _message_strings(tree) if FLAG.search(text)]
    assert not found, f"{path.name} raises or warns with command-line flags: {found}"


@pytest.mark.parametrize(
    "call, param",
    [
        (lambda: areamc.seeds.make_seed(-1), "seed"),
        (lambda: areamc.StopRule(points=0), "points"),
        (lambda: areamc.StopRule(points=None, relative=-1.0), "tolerance"),
        (lambda: areamc.StopRule(points=10, relative=0.1), "tolerance"),
        (lambda: areamc.intervals.check_confidence(1.5), "confidence"),
        (lambda: areamc.engine.accumulate(lambda n: (np.zeros(n), np.zeros(n)), lambda x, y: x > 0,
                                          areamc.stopping.Stopper(areamc.StopRule(points=5)), chunk=0), "chunk"),
        (lambda: areamc.samplers.make_sampler("nope", np.random.SeedSequence(1), areamc.Box(0, 0, 1, 1)), "sampler"),
        (lambda: areamc.project.densify(np.array([]), areamc.project.LONLAT, 0.0), "densify_m"),
        (lambda: areamc.resolve_plane((10.0, 47.0, 11.0, 48.0), "EPSG:3857"), "crs"),
        (lambda: areamc.load.parse_crs("not a crs", "input_crs"), "input_crs"),
        (lambda: areamc.units.parse_distance("5 parsecs"), "radius_m"),
        (lambda: areamc.units.area_factor("acres2"), "units"),
        (lambda: areamc.expression.parse_expression("x +* 2"), "density"),
        (lambda: areamc.sequential.check_claim(2.0), "claim"),
        (lambda: areamc.estimate_coverage(None, None, ks=(0,)), "ks"),
    ],
)
def test_library_call__bad_argument__names_the_parameter_not_a_flag(call, param):
    with pytest.raises(AreamcError) as info:
        call()
    err = info.value
    assert err.param == param
    assert param in str(err)
    assert not FLAG.search(str(err)), str(err)


def test_describe__renders_flags__default_and_special_names():
    assert describe(OptionError("{param}: bad", param="seed")) == "--seed: bad"
    assert describe(OptionError("{param}: bad", param="densify_m")) == "--densify: bad"
    assert describe(OptionError("x {radius_m} or {radius_field}", params=("radius_m", "radius_field"))) == "x --radius or --radius-field"
    assert describe(OptionError("plain")) == "plain"


def test_cli__library_error__is_rendered_with_the_flag(capsys):
    rc, out, err = run_cli(capsys, ["area", "sample_data/vale_districts.geojson", "--plane-crs", "EPSG:3857"])
    assert rc == 2 and out == ""
    assert err.startswith("areamc: error: --plane-crs EPSG:3857: not equal-area")


@pytest.mark.parametrize("path", CLI, ids=lambda p: p.name)
def test_cli_module__holds_no_geometry_or_estimation_code(path):
    """The command line parses, calls the library and renders: it imports no geometry or numeric library."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    imported = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported |= {alias.name.split(".")[0] for alias in node.names}
        elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
            imported.add(node.module.split(".")[0])
    assert not imported & {"numpy", "shapely", "pyproj", "fiona", "rasterio", "scipy"}, imported
