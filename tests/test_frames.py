"""Results as pandas DataFrames (areamc.frames, ``report.to_dataframe(units=...)``).

What a frame holds is checked against the command line's own output for the same run (the JSON
``results`` and the ``--trace`` CSV, which docs/output.md documents), and its unit conversion
against the unit definitions: 1 ha = 10⁴ m² and 1 km² = 10⁶ m² (SI); 1 acre = 43 560 ft² =
4 046.856 422 4 m² and 1 mi² = 5 280² ft² = 2 589 988.110 336 m², with the international foot of
0.3048 m (NIST Handbook 44, Appendix C).  The test data are written here, in tmp_path.
"""

from __future__ import annotations

import csv
import io
import json
import math
import sys

import fiona
import pytest
from shapely.geometry import Polygon, box, mapping

from areamc.area import AreaReport, estimate_areas
from areamc.cli import area as cli_area
from areamc.cli import coverage as cli_coverage
from areamc.cli import integrate as cli_integrate
from areamc.cli import overlap as cli_overlap
from areamc.coverage import CoverageReport, estimate_coverage
from areamc.density import build_density, read_density
from areamc.errors import OptionError
from areamc.frames import TABLES, table_columns, to_dataframe
from areamc.integrate import IntegrateReport, integrate_density
from areamc.load import read_layer
from areamc.overlap import OverlapReport, estimate_overlaps
from areamc.project import project_layer, project_layers
from areamc.stopping import StopRule
from conftest import run_cli

pd = pytest.importorskip("pandas", reason="pandas is optional (pip install 'areamc[dataframe]')")

#: Square metres per unit: SI for ha and km²; NIST Handbook 44, Appendix C for the acre and the
#: square mile (international foot 0.3048 m; 1 acre = 43 560 ft², 1 mi = 5 280 ft), written out here.
M2_PER = {"m2": 1.0, "ha": 1.0e4, "km2": 1.0e6, "acre": 4046.8564224, "mi2": 2589988.110336}
POINTS = 4000
SEED = 11
#: A density per m² in lon/lat (WGS84 degrees): larger to the east, so mean densities differ by region.
DENSITY = "1e-4*(1+20*(lon-9.98))"


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    """A GeoPackage in EPSG:4326 (lon/lat degrees): three overlapping parcels, two regions across
    them, and two parcels far apart (no overlap)."""
    path = tmp_path_factory.mktemp("frames") / "parcels.gpkg"
    layers = {
        "parcels": {"a": box(10.00, 47.00, 10.10, 47.06), "b": box(10.06, 47.02, 10.16, 47.08),
                    "c": Polygon([(10.02, 47.04), (10.14, 47.04), (10.08, 47.10)])},
        "regions": {"west": box(9.98, 46.98, 10.09, 47.11), "east": box(10.09, 46.98, 10.20, 47.11)},
        "apart": {"p": box(10.0, 47.0, 10.02, 47.02), "q": box(10.5, 47.5, 10.52, 47.52)},
    }
    for name, shapes in layers.items():
        with fiona.open(path, "w", driver="GPKG", layer=name, crs="EPSG:4326",
                        schema={"geometry": "Polygon", "properties": {"name": "str"}}) as dst:
            for fid, geom in shapes.items():
                dst.write({"geometry": mapping(geom), "properties": {"name": fid}})
    return str(path)


def read(path, layer):
    return read_layer(path, layer=layer, id_field="name")


def cli_json(capsys, argv, units):
    rc, out, err = run_cli(capsys, [*map(str, argv), "-n", str(POINTS), "--seed", str(SEED), "--workers", "1",
                                    "--format", "json", "--units", units, "-q"])
    assert rc == 0, err
    return json.loads(out)


def same_value(frame_value, json_value) -> bool:
    """A frame cell against the JSON value: None (JSON null) is None or NaN in the frame; JSON writes
    infinities as "inf"/"-inf" (docs/output.md); every other number must be equal to the last bit."""
    if json_value is None:
        return frame_value is None or (isinstance(frame_value, float) and math.isnan(frame_value))
    if json_value in ("inf", "-inf") and isinstance(frame_value, float):
        return frame_value == float(json_value)
    if isinstance(json_value, bool) or isinstance(frame_value, bool):
        return bool(frame_value) == json_value and isinstance(json_value, bool)
    return frame_value == json_value


def assert_frame_is_json(frame, results, units):
    assert frame.attrs["units"] == units
    assert len(frame) == len(results)
    for record, row in zip(frame.to_dict("records"), results):
        assert list(record) == list(row), "columns: the JSON row's fields, in their order"
        bad = {k: (record[k], row[k]) for k in row if not same_value(record[k], row[k])}
        assert not bad, bad


def assert_metadata_is_json(frame, doc):
    metadata = frame.attrs["metadata"]
    assert metadata and {"plane", "confidence", "seed", "sampler", "stop", "versions"} <= set(metadata)
    for key, value in metadata.items():
        assert json.loads(json.dumps(value)) == doc[key], key


# --------------------------------------------------------------------------- the same values as the JSON output


@pytest.mark.parametrize("units", sorted(M2_PER))
def test_area_frame__equals_the_json_rows__every_unit(capsys, data, units):
    report = estimate_areas(project_layer(read(data, "parcels")), stop=StopRule(points=POINTS), seed=SEED)
    doc = cli_json(capsys, ["area", data, "--layer", "parcels", "--id-field", "name"], units)
    frame = report.to_dataframe(units=units)
    assert_frame_is_json(frame, doc["results"], units)
    assert_metadata_is_json(frame, doc)


def test_area_trace_frame__equals_the_trace_file(capsys, data, tmp_path):
    report = estimate_areas(project_layer(read(data, "parcels")), stop=StopRule(points=POINTS), seed=SEED,
                            trace_every=1000)
    trace = tmp_path / "trace.csv"
    cli_json(capsys, ["area", data, "--layer", "parcels", "--id-field", "name", "--trace", trace,
                      "--trace-every", "1000"], "ha")
    rows = list(csv.DictReader(io.StringIO(trace.read_text())))
    frame = report.to_dataframe(units="ha", which="trace")
    assert len(frame) == len(rows) == 3 * POINTS // 1000
    assert list(frame.columns) == list(rows[0])
    for record, row in zip(frame.to_dict("records"), rows):
        assert {k: str(v) for k, v in record.items()} == row  # CSV holds each float's repr, exactly


def test_overlap_frames__pairs_and_profile_equal_the_json(capsys, data):
    report = estimate_overlaps(project_layer(read(data, "parcels")), stop=StopRule(points=POINTS), seed=SEED)
    doc = cli_json(capsys, ["overlap", data, "--zones-layer", "parcels", "--zones-id-field", "name"], "acre")
    pairs = report.to_dataframe(units="acre")
    assert len(pairs) == 3  # a-b, a-c, b-c all overlap (drawn so)
    assert_frame_is_json(pairs, doc["results"], "acre")
    assert_metadata_is_json(pairs, doc)
    profile = report.to_dataframe(units="acre", which="profile")
    assert list(profile["k"]) == [1, 2, 3]
    assert_frame_is_json(profile, doc["multiplicity"], "acre")


def test_coverage_frame__with_population__equals_the_json(capsys, data):
    regions, zones = project_layers([read(data, "regions"), read(data, "parcels")])
    density = build_density(read_density(DENSITY), regions.plane, None, regions)
    report = estimate_coverage(regions, zones, ks=(1, 2), stop=StopRule(points=POINTS), seed=SEED, density=density)
    doc = cli_json(capsys, ["coverage", data, data, "--regions-layer", "regions", "--regions-id-field", "name",
                            "--zones-layer", "parcels", "--zones-id-field", "name", "--at-least", "1",
                            "--at-least", "2", "--density", DENSITY], "mi2")
    frame = report.to_dataframe(units="mi2")
    assert len(frame) == 4 and "population_share" in frame.columns
    assert_frame_is_json(frame, doc["results"], "mi2")
    assert_metadata_is_json(frame, doc)


def test_coverage_frame__without_density__has_no_population_columns(data):
    regions, zones = project_layers([read(data, "regions"), read(data, "parcels")])
    frame = estimate_coverage(regions, zones, stop=StopRule(points=POINTS), seed=SEED).to_dataframe()
    assert not [c for c in frame.columns if c.startswith("population_")]
    assert list(frame.columns) == list(TABLES[CoverageReport]["rows"].own_fields)


def test_integrate_frame__equals_the_json(capsys, data):
    regions = project_layer(read(data, "regions"))
    source = build_density(read_density(DENSITY), regions.plane, None, regions)
    report = integrate_density(regions, source, stop=StopRule(points=POINTS), seed=SEED)
    doc = cli_json(capsys, ["integrate", data, "--regions-layer", "regions", "--regions-id-field", "name",
                            "--density", DENSITY], "ha")
    frame = report.to_dataframe(units="ha")
    assert_frame_is_json(frame, doc["results"], "ha")
    assert_metadata_is_json(frame, doc)


def test_empty_overlap__frame_has_the_record_columns_as_the_csv_header_does(capsys, data):
    report = estimate_overlaps(project_layer(read(data, "apart")), stop=StopRule(points=POINTS), seed=SEED)
    frame = report.to_dataframe()
    assert len(frame) == 0 and report.rows == ()
    rc, out, err = run_cli(capsys, ["overlap", data, "--zones-layer", "apart", "-n", "1000", "--seed", "1",
                                    "--format", "csv", "-q"])
    assert rc == 0, err
    assert out.splitlines() == [",".join(frame.columns)]  # the header alone, the same fields


# --------------------------------------------------------------------------- units


@pytest.fixture(scope="module")
def integrate_report(data):
    regions = project_layer(read(data, "regions"))
    source = build_density(read_density(DENSITY), regions.plane, None, regions)
    return integrate_density(regions, source, stop=StopRule(points=POINTS), seed=SEED)


@pytest.mark.parametrize("units", ["ha", "km2", "acre", "mi2"])
def test_units__areas_divided_and_densities_multiplied_by_the_units_m2__nist_hb44(data, integrate_report, units):
    area = estimate_areas(project_layer(read(data, "parcels")), stop=StopRule(points=POINTS), seed=SEED)
    for report, areas, per_area in [(area, ["estimate", "std_error", "ci_low", "ci_high", "box_area",
                                            "exact_planar", "geodesic"], []),
                                    (integrate_report, ["region_area"], ["mean_density"])]:
        base, other = report.to_dataframe(units="m2"), report.to_dataframe(units=units)
        assert list(base.columns) == list(other.columns)
        for column in base.columns:
            if column in areas:
                expected = base[column] / M2_PER[units]
            elif column in per_area:
                expected = base[column] * M2_PER[units]
            else:  # counts, shares, z scores, ids: never converted
                assert other[column].equals(base[column]), column
                continue
            assert other[column].to_numpy() == pytest.approx(expected.to_numpy(), rel=1e-12), column


def test_units__default_is_km2(data):
    report = estimate_areas(project_layer(read(data, "parcels")), stop=StopRule(points=POINTS), seed=SEED)
    frame = report.to_dataframe()
    assert frame.attrs["units"] == "km2"
    assert frame["exact_planar"].tolist() == pytest.approx([r.exact_planar / 1e6 for r in report.rows], rel=1e-12)


# --------------------------------------------------------------------------- one list of area fields


#: Every table a command prints, with the report table whose fields it shows.
CLI_TABLES = [
    (cli_area.COLUMNS, AreaReport, "rows"),
    (cli_area.TRACE_COLUMNS, AreaReport, "trace"),
    (cli_overlap.COLUMNS, OverlapReport, "rows"),
    (cli_overlap.PROFILE_COLUMNS, OverlapReport, "profile"),
    (cli_coverage.COLUMNS + cli_coverage.WIDE_COLUMNS + cli_coverage.POPULATION_COLUMNS, CoverageReport, "rows"),
    (cli_integrate.COLUMNS + cli_integrate.WIDE_COLUMNS, IntegrateReport, "rows"),
]


@pytest.mark.parametrize("columns, report_type, which", CLI_TABLES)
def test_command_tables__mark_areas_as_the_library_does(columns, report_type, which):
    library = {c.field: (c.area, c.per_area) for c in table_columns(report_type, which)}
    for column in columns:
        assert column.field in library, column.field
        assert (column.area, column.per_area) == library[column.field], column.field


def test_command_screens__convert_with_the_library_columns():
    for screen, report_type in [(cli_area.SCREEN, AreaReport), (cli_overlap.SCREEN, OverlapReport),
                                (cli_coverage.SCREEN, CoverageReport), (cli_integrate.SCREEN, IntegrateReport)]:
        expected = [(c.field, c.area, c.per_area) for c in table_columns(report_type)]
        assert [(c.field, c.area, c.per_area) for c in screen.fields] == expected


# --------------------------------------------------------------------------- refusals


def test_refused__unknown_unit_table_or_object(data):
    report = estimate_areas(project_layer(read(data, "apart")), stop=StopRule(points=100), seed=SEED)
    cases = [(lambda: report.to_dataframe(units="furlong2"), "units"),
             (lambda: report.to_dataframe(which="profile"), "which"),
             (lambda: to_dataframe(object()), "report")]
    for call, param in cases:
        with pytest.raises(OptionError) as err:
            call()
        assert err.value.param == param and str(err.value).startswith(param + ":"), str(err.value)


def test_refused__without_pandas__says_how_to_install_it(data, monkeypatch):
    report = estimate_areas(project_layer(read(data, "apart")), stop=StopRule(points=100), seed=SEED)
    monkeypatch.setitem(sys.modules, "pandas", None)  # import pandas now raises ImportError
    with pytest.raises(ImportError, match=r"pip install 'areamc\[dataframe\]'"):
        report.to_dataframe()
