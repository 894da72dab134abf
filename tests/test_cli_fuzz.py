"""Property-based fuzzing of option values through the command line (hypothesis).

Whatever values a user types, areamc either answers (exit 0, a parseable JSON result) or refuses
in one line (exit 2, ``areamc: error:``), never with a traceback or another status, and never
touches its input.  The brief's rule for bad input, checked over generated option values; the
derandomized profile keeps CI deterministic.
"""

from __future__ import annotations

import json

import fiona
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from shapely.geometry import box, mapping

from conftest import checksums, run_cli

FUZZ = settings(max_examples=40, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])


@pytest.fixture(scope="module")
def layer(tmp_path_factory):
    folder = tmp_path_factory.mktemp("fuzz")
    schema = {"geometry": "Polygon", "properties": {"name": "str"}}
    with fiona.open(folder / "d.geojson", "w", driver="GeoJSON", crs="EPSG:4326", schema=schema) as dst:
        for i in range(2):
            dst.write({"geometry": mapping(box(10 + 0.1 * i, 47, 10.1 + 0.1 * i, 47.08)),
                       "properties": {"name": f"D{i}"}})
    return folder


#: Option texts a person might type: numbers in many spellings, units, percentages, junk.
TEXT = st.one_of(
    st.integers(-10, 10**7).map(str),
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.sampled_from(["0", "-0", "1e3", "1e-9", "5%", "0.5%", "100%", "150%", "1_000", "nan", "inf", "-inf",
                     "1km", "5 km", "2mi", "", " ", "x", "1e400", "0x10", "3.5.1", "--"]),
    st.text(max_size=8),
)
OPTIONS = ["--points", "--tolerance", "--max-points", "--confidence", "--seed", "--chunk", "--densify",
           "--units", "--trace-every", "--time-limit", "--point-cap", "--sampler", "--plane-crs"]


def _check(capsys, argv, folder):
    before = checksums(folder)
    rc, out, err = run_cli(capsys, argv)
    assert "Traceback" not in err, err
    assert rc in (0, 2), (argv, rc, err)
    if rc == 2:
        errors = [line for line in err.splitlines() if line.startswith("areamc: error:")]
        assert len(errors) == 1 and out == "", (argv, err)
    else:
        json.loads(out)
    assert checksums(folder) == before


@FUZZ
@given(pairs=st.lists(st.tuples(st.sampled_from(OPTIONS), TEXT), min_size=1, max_size=3))
def test_area_options__any_values__answer_or_one_line_refusal(capsys, layer, pairs):
    argv = ["area", str(layer / "d.geojson"), "--format", "json", "--units", "m2", "-q", "--point-cap", "200000"]
    for option, value in pairs:
        argv += [option, value]
    if not any(o in ("--points", "--tolerance") for o, _ in pairs):
        argv += ["--points", "2000"]
    _check(capsys, argv, layer)


@FUZZ
@given(expression=st.one_of(
    st.text(alphabet="xylonat0123456789.+-*/()e ,<>=", max_size=30),
    st.sampled_from(["exp(x)", "where(x>0,1,0)", "sqrt(-1)", "log(0)", "x**x", "1/(x-x)", "lat*lon", "hypot(x,y)"]),
))
def test_integrate_expression__any_text__answer_or_one_line_refusal(capsys, layer, expression):
    argv = ["integrate", str(layer / "d.geojson"), "--density", expression, "--density-kind", "expression",
            "--points", "500", "--format", "json", "--units", "m2", "-q"]
    _check(capsys, argv, layer)
