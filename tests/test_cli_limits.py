"""Bounds on work, decisions that must not pass silently, and digits that do not depend on --chunk.

Every refusal is checked with conftest.assert_refused: one ``areamc: error:`` line naming the option,
exit status 2, nothing on stdout, no traceback, and the inputs (written by the test in tmp_path)
unchanged.  Expected values come from the brief's rules and from independent arithmetic in the test.
"""

from __future__ import annotations

import json
import math

import fiona
import pytest
from shapely.geometry import box, mapping

from conftest import assert_refused, run_cli
from areamc.stopping import POINT_CAP, StopRule
from areamc.errors import OptionError

CRS84 = "EPSG:4326"


@pytest.fixture()
def folder(tmp_path):
    """Two districts and four blocks with counts, as GeoJSON in tmp_path (lon/lat degrees)."""
    districts = [box(10.0, 47.0, 10.2, 47.1), box(10.2, 47.0, 10.4, 47.1)]
    schema = {"geometry": "Polygon", "properties": {"name": "str", "people": "float"}}
    with fiona.open(tmp_path / "districts.geojson", "w", driver="GeoJSON", crs=CRS84, schema=schema) as dst:
        for i, g in enumerate(districts):
            dst.write({"geometry": mapping(g), "properties": {"name": f"D{i}", "people": 0.0}})
    with fiona.open(tmp_path / "blocks.geojson", "w", driver="GeoJSON", crs=CRS84, schema=schema) as dst:
        for i in range(4):
            g = box(10.0 + 0.1 * i, 47.0, 10.1 + 0.1 * i, 47.1)
            dst.write({"geometry": mapping(g), "properties": {"name": f"B{i}", "people": 1000.0 * (i + 1)}})
    point = {"geometry": "Point", "properties": {"name": "str"}}
    with fiona.open(tmp_path / "points.geojson", "w", driver="GeoJSON", crs=CRS84, schema=point) as dst:
        for i, lon in enumerate((10.1, 10.3)):
            dst.write({"geometry": {"type": "Point", "coordinates": (lon, 47.05)}, "properties": {"name": f"P{i}"}})
    zone = {"geometry": "Polygon", "properties": {"name": "str"}}
    with fiona.open(tmp_path / "zones.geojson", "w", driver="GeoJSON", crs=CRS84, schema=zone) as dst:
        dst.write({"geometry": mapping(box(10.05, 47.0, 10.3, 47.1)), "properties": {"name": "Z0"}})
    return tmp_path


DISTRICTS = "{f}/districts.geojson"
BLOCKS = "{f}/blocks.geojson"
ZONES = "{f}/zones.geojson"
POINTS = "{f}/points.geojson"

REFUSED = [
    # (case, argv template, message pattern)
    ("points over the cap", ["area", DISTRICTS, "-n", "1e12"],
     r"--points: 1,000,000,000,000 points per estimate is over the cap of 200,000,000 .*--point-cap"),
    ("max-points over the cap", ["area", DISTRICTS, "--tolerance", "0.1%", "--max-points", "1e12"],
     r"--max-points: .* over the cap .*--point-cap"),
    ("points over a lowered cap", ["area", DISTRICTS, "-n", "5000", "--point-cap", "1000"],
     r"--points: 5,000 points per estimate is over the cap of 1,000"),
    ("circle vertices over the cap", ["overlap", POINTS, "--radius", "3km", "--circle-vertices", "1e7"],
     r"--circle-vertices: 10,000,000 vertices per circle is over the cap of 100,000 .*--vertex-cap"),
    ("densify to nothing", ["area", DISTRICTS, "--densify", "1e-9"],
     r"--densify: a step of 1e-09 m would give about [\d,]+ vertices; at most 20,000,000"),
    ("integrate with one point", ["integrate", DISTRICTS, "--density", "1e-4", "-n", "1"],
     r"--points: a density-weighted run needs at least 2 points per region, got 1"),
    ("coverage density with one point",
     ["coverage", DISTRICTS, ZONES, "--density", BLOCKS, "--count-field", "people", "-n", "1"],
     r"--points: a density-weighted run needs at least 2 points"),
    ("1000-term expression", ["integrate", DISTRICTS, "--density", "+".join(["x"] * 1000), "-n", "100"],
     r"--density: the expression .* nests \d+ operations deep; at most 100"),
    ("100,000-character expression", ["integrate", DISTRICTS, "--density", "x+" * 50_000 + "1", "-n", "100"],
     r"--density: the expression is 100,001 characters long; at most 2,000"),
    ("where with 4 arguments", ["integrate", DISTRICTS, "--density", "where(x>0,1,0,3)", "-n", "100"],
     r"--density: where\(\) with 4 argument\(s\) refused \(3 expected\)"),
    ("exp with none", ["integrate", DISTRICTS, "--density", "exp()", "-n", "100"],
     r"--density: exp\(\) with 0 argument\(s\) refused \(1 expected\)"),
    ("clip with 2", ["integrate", DISTRICTS, "--density", "clip(x, 1)", "-n", "100"],
     r"--density: clip\(\) with 2 argument\(s\) refused \(3 expected\)"),
    ("overflow", ["integrate", DISTRICTS, "--density", "e**e**e**e", "-n", "100"],
     r"--density: expression 'e\*\*e\*\*e\*\*e' gives inf at plane point"),
]


@pytest.mark.parametrize("case, argv, match", REFUSED, ids=[c[0] for c in REFUSED])
def test_cli__bound_on_work__refused_in_one_line(capsys, folder, case, argv, match):
    argv = [a.format(f=folder) for a in argv]
    assert_refused(capsys, argv, match, folder)


def test_stop_rule__point_cap_raised_knowingly__accepts_more_points():
    rule = StopRule(points=POINT_CAP + 1, point_cap=10 * POINT_CAP)
    assert rule.point_budget == POINT_CAP + 1
    with pytest.raises(OptionError) as info:
        StopRule(points=POINT_CAP + 1)
    assert info.value.params == ("points", "point_cap")


def test_fail_on_shortfall__undecided_verdicts__exit_3_with_output(capsys, folder):
    """20 points cannot decide a claim at 0.95 (the confidence sequence, Howard et al. 2021, needs more):
    the job must not pass as if it had (brief: a scheduled job passes without a decision)."""
    out = folder / "cov.json"
    rc, _, err = run_cli(capsys, ["coverage", str(folder / "districts.geojson"), str(folder / "zones.geojson"),
                                  "--claim", "0.5", "-n", "20", "--seed", "1", "--fail-on-shortfall", "-o", str(out)])
    doc = json.loads(out.read_text())
    verdicts = {row["verdict"] for row in doc["results"]}
    assert verdicts == {"undecided"}, verdicts
    assert rc == 3, err


def test_fail_on_shortfall__a_shortfall_wins_over_undecided__exit_1(capsys, folder):
    # D1 is 0.5 covered by area (10.2..10.3 of 10.2..10.4): a claim of 0.99 falls short quickly there,
    # while D0 (0.75 covered) is far from it as well; both decided as "falls-short" with enough points.
    rc, out, err = run_cli(capsys, ["coverage", str(folder / "districts.geojson"), str(folder / "zones.geojson"),
                                    "--claim", "0.99", "-n", "50000", "--seed", "2", "--fail-on-shortfall",
                                    "--format", "json", "--units", "m2", "-q"])
    assert rc == 1, err
    assert "falls-short" in {row["verdict"] for row in json.loads(out)["results"]}


@pytest.mark.parametrize("density", ["expression", "uniform blocks"])
def test_weighted_sums__any_chunk__same_digits(capsys, folder, density):
    """The brief: results for a seed do not depend on --chunk.  Real-valued scores are summed in a fixed
    order (areamc.engine), so the JSON results are identical to the last digit."""
    base = ["integrate", str(folder / "districts.geojson"), "-n", "30000", "--seed", "5", "--format", "json", "--units", "m2", "-q"]
    if density == "expression":
        base += ["--density", "1e-4 * (1 + sin(x / 3000.0) ** 2)"]
    else:
        base += ["--density", str(folder / "blocks.geojson"), "--count-field", "people", "--no-importance"]
    results = []
    for chunk in ("65536", "1000", "777", "4096"):
        rc, out, err = run_cli(capsys, [*base, "--chunk", chunk])
        assert rc == 0, err
        results.append(json.loads(out)["results"])
    assert all(r == results[0] for r in results[1:])
    assert all(math.isfinite(row["estimate"]) and row["estimate"] > 0 for row in results[0])


def test_double_dash__a_file_named_dash_v__is_a_file_not_verbose(capsys, folder, monkeypatch):
    """After ``--`` every argument is a file (POSIX utility syntax guideline 10, common practice): a file
    named ``-v`` must not switch on tracebacks, so a bad option still gives one line."""
    import shutil

    shutil.copy(folder / "districts.geojson", folder / "-v")
    monkeypatch.chdir(folder)
    assert_refused(capsys, ["area", "--plane-crs", "EPSG:3857", "-n", "100", "--", "-v"],
                   r"--plane-crs EPSG:3857: not equal-area", folder)
