"""Every input form areamc reads, on files each test writes in its tmp_path, and the refusal of each
form it cannot read, in one line that says what would make it readable.

Forms: a zipped Shapefile (``.zip``, ``zip://``, ``zip://...!member``, ``/vsizip/``, a path through
the archive), a zipped GeoPackage, a CSV of lon/lat columns or of WKT through GDAL open options,
GeoParquet (where the ``parquet`` extra is installed), a geopandas GeoDataFrame or GeoSeries (where
geopandas is installed) and shapely geometries with attributes.  A layer read through a zip archive
must be the layer read from the unzipped file by fiona (the reference reader, with shapely's WKB as
the bit-for-bit comparison); areas are checked against pyproj.Geod (Karney 2013) on the polygons
the test wrote; a CSV's points against the numbers the test wrote into it.  The two readers
(fiona, and pyogrio where installed) must give identical layers, and the damaged-file checks of
tests/test_cli_inputs.py must say the same whichever reader is chosen.
"""

from __future__ import annotations

import math
import re
import sys
import warnings
import zipfile

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import Point, box, mapping

from conftest import assert_refused, run_json
from areamc import load
from areamc.errors import CRSError, LayerError, OptionError
from areamc.load import (
    READER_VARIABLE,
    gdal_path,
    is_network_path,
    layer_from_geometries,
    list_layers,
    parse_open_options,
    read_layer,
)
from areamc.zones import read_zones, zones_from_points

GEOD = pyproj.Geod(ellps="WGS84")
FAST = ["-n", "2000", "--seed", "3", "-q"]
DISTRICTS = {"N1": box(10.00, 47.00, 10.10, 47.08), "N2": box(10.20, 47.00, 10.32, 47.10)}
#: Invented facility points: (id, lon, lat, reach in metres).
CLINICS = [("C1", 10.05, 47.04, 3000.0), ("C2", 10.26, 47.05, 1500.0), ("C3", 10.28, 47.06, 800.0)]

try:
    import pyogrio  # noqa: F401
    HAS_PYOGRIO = True
except ImportError:
    HAS_PYOGRIO = False
try:
    import geopandas
except ImportError:
    geopandas = None
try:
    import pyarrow  # noqa: F401
    HAS_PYARROW = True
except ImportError:
    HAS_PYARROW = False
needs_geopandas = pytest.mark.skipif(geopandas is None, reason="geopandas not installed (pip install 'areamc[geopandas]')")
needs_parquet = pytest.mark.skipif(geopandas is None or not HAS_PYARROW,
                                   reason="geopandas and pyarrow not installed (pip install 'areamc[parquet]')")
READERS = ["fiona", pytest.param("pyogrio", marks=pytest.mark.skipif(
    not HAS_PYOGRIO, reason="pyogrio not installed (pip install 'areamc[pyogrio]')"))]


def geod_area(geom) -> float:
    """|area| m2 of a lon/lat polygon on WGS84, edges densified to 0.001 degrees (pyproj.Geod, Karney 2013)."""
    return abs(GEOD.geometry_area_perimeter(shapely.segmentize(geom, 0.001))[0])


def write_shapefile(folder, name="districts") -> str:
    schema = {"geometry": "Polygon", "properties": {"district": "str", "homes": "int", "share": "float"}}
    path = folder / f"{name}.shp"
    with fiona.open(path, "w", driver="ESRI Shapefile", crs="EPSG:4326", schema=schema) as dst:
        for n, (key, geom) in enumerate(DISTRICTS.items()):
            dst.write({"geometry": mapping(geom), "properties": {"district": key, "homes": 100 * (n + 1),
                                                                 "share": 0.25 * (n + 1)}})
    return str(path)


def zip_files(archive, files, arcnames=None) -> str:
    with zipfile.ZipFile(archive, "w", zipfile.ZIP_DEFLATED) as z:
        for n, f in enumerate(files):
            z.write(f, arcnames[n] if arcnames else f.name)
    return str(archive)


def zipped_shapefile(folder) -> tuple[str, str]:
    """The districts Shapefile written in folder/src and zipped as folder/districts_shp.zip: (archive, .shp)."""
    (folder / "src").mkdir()
    shp = write_shapefile(folder / "src")
    return zip_files(folder / "districts_shp.zip", sorted((folder / "src").glob("districts.*"))), shp


def same_layer(a, b) -> bool:
    """Same features: ids, positions, typed attributes, fields, CRS, counts by type, geometries bit for bit."""
    typed = [[(k, type(v), v) for k, v in p.items()] for p in a.properties]
    return (a.ids == b.ids and a.indices == b.indices and a.fields == b.fields and a.crs == b.crs
            and a.geometry_types == b.geometry_types and a.empty == b.empty and a.skipped == b.skipped
            and typed == [[(k, type(v), v) for k, v in p.items()] for p in b.properties]
            and len(a) == len(b) and bool(np.all(shapely.to_wkb(a.geometries) == shapely.to_wkb(b.geometries))))


def write_csv(path, header, rows) -> str:
    path.write_text(",".join(header) + "\n" + "".join(",".join(str(v) for v in r) + "\n" for r in rows))
    return str(path)


@pytest.fixture()
def reader(monkeypatch, request):
    """Choose the reader by AREAMC_READER for the test (parametrized over fiona and pyogrio)."""
    monkeypatch.setenv(READER_VARIABLE, request.param)
    return request.param


# ------------------------------------------------------------------------------------ zip archives


@pytest.mark.parametrize("reader", READERS, indirect=True)
@pytest.mark.parametrize("form", ["{zip}", "zip://{zip}", "zip://{zip}!districts.shp", "/vsizip/{zip}",
                                  "/vsizip/{zip}/districts.shp", "{zip}/districts.shp"])
def test_zipped_shapefile__every_form__same_layer_as_the_unzipped_file(tmp_path, reader, form):
    archive, shp = zipped_shapefile(tmp_path)
    text = form.format(zip=archive)
    layer = read_layer(text, id_field="district")
    direct = read_layer(shp, id_field="district")
    assert layer.path == text and layer.layer == "districts"
    assert same_layer(layer, direct)
    # the attributes as the test wrote them (fiona's Shapefile types: str, int, float)
    assert [p["homes"] for p in layer.properties] == [100, 200]
    assert list_layers(text) == ["districts"]


def test_zipped_shapefile__area_command__geodesic_areas_of_the_written_polygons(capsys, tmp_path):
    archive, _ = zipped_shapefile(tmp_path)
    doc = run_json(capsys, ["area", archive, "--id-field", "district", *FAST])
    got = {r["id"]: r["geodesic"] for r in doc["results"]}
    for key, geom in DISTRICTS.items():  # pyproj.Geod on the polygons written (Karney 2013)
        assert got[key] == pytest.approx(geod_area(geom), rel=1e-6)
    assert doc["input"]["path"] == archive and doc["input"]["layer"] == "districts"


def test_zipped_geopackage__read_through_the_archive(tmp_path):
    gpkg = tmp_path / "zones.gpkg"
    schema = {"geometry": "Polygon", "properties": {"zone": "str"}}
    with fiona.open(gpkg, "w", driver="GPKG", crs="EPSG:4326", schema=schema, layer="zones") as dst:
        for key, geom in DISTRICTS.items():
            dst.write({"geometry": mapping(geom), "properties": {"zone": key}})
    archive = zip_files(tmp_path / "zones.zip", [gpkg])
    assert same_layer(read_layer(archive, id_field="zone"), read_layer(str(gpkg), id_field="zone"))


def test_kml__a_driver_fiona_does_not_list__read(tmp_path):
    """KML 2.2 (OGC 07-147r2): a Placemark's Polygon outerBoundaryIs, lon,lat pairs on WGS84."""
    ring = " ".join(f"{x},{y}" for x, y in DISTRICTS["N1"].exterior.coords)
    path = tmp_path / "district.kml"
    path.write_text('<?xml version="1.0" encoding="UTF-8"?><kml xmlns="http://www.opengis.net/kml/2.2"><Document>'
                    "<Placemark><name>N1</name><Polygon><outerBoundaryIs><LinearRing><coordinates>"
                    f"{ring}</coordinates></LinearRing></outerBoundaryIs></Polygon></Placemark></Document></kml>")
    layer = read_layer(str(path), id_field="Name")
    assert layer.ids == ("N1",) and layer.crs.to_epsg() == 4326
    assert shapely.equals(layer.geometries[0], DISTRICTS["N1"])


def test_gdal_path__forms(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    (tmp_path / "a.zip").write_bytes(b"PK")
    # GDAL's virtual file systems (GDAL documentation, "GDAL Virtual File Systems")
    assert gdal_path("a.zip") == "/vsizip/a.zip"
    assert gdal_path("a.zip/in/b.shp") == "/vsizip/a.zip/in/b.shp"
    assert gdal_path("zip://a.zip!in/b.shp") == "/vsizip/a.zip/in/b.shp"
    assert gdal_path("zip+https://example.org/a.zip!b.shp") == "/vsizip//vsicurl/https://example.org/a.zip/b.shp"
    assert gdal_path("s3://bucket/key.gpkg") == "/vsis3/bucket/key.gpkg"
    assert gdal_path("/vsigzip/x.geojson.gz") == "/vsigzip/x.geojson.gz"
    assert gdal_path("missing.zip") == "missing.zip"  # not a file: left for the refusal to name
    assert is_network_path("https://example.org/a.gpkg") and is_network_path("/vsicurl/http://h/x.gpkg")
    assert is_network_path("zip+https://example.org/a.zip") and not is_network_path("a.zip")


# ------------------------------------------------------------------------------- CSV with open options


def clinics_csv(folder) -> str:
    return write_csv(folder / "clinics.csv", ["clinic", "lon", "lat", "reach_m"], CLINICS)


@pytest.mark.parametrize("reader", READERS, indirect=True)
def test_csv_lon_lat__open_options__points_as_written(tmp_path, reader):
    path = clinics_csv(tmp_path)
    layer = read_layer(path, kind="point", id_field="clinic", input_crs="EPSG:4326",
                       open_options={"X_POSSIBLE_NAMES": "lon", "Y_POSSIBLE_NAMES": "lat"})
    assert layer.ids == ("C1", "C2", "C3")
    assert [(g.x, g.y) for g in layer.geometries] == [(lon, lat) for _, lon, lat, _ in CLINICS]
    # CSV text stays text unless AUTODETECT_TYPE is asked for (GDAL CSV driver documentation)
    assert [p["reach_m"] for p in layer.properties] == ["3000.0", "1500.0", "800.0"]


def test_csv_wkt__geom_possible_names__polygon_areas(capsys, tmp_path):
    rows = [(key, f'"{geom.wkt}"') for key, geom in DISTRICTS.items()]
    path = write_csv(tmp_path / "districts.csv", ["district", "outline"], rows)
    doc = run_json(capsys, ["area", path, "--open-option", "GEOM_POSSIBLE_NAMES=outline", "--input-crs", "EPSG:4326",
                            "--id-field", "district", *FAST])
    for row in doc["results"]:  # pyproj.Geod on the polygons written as WKT (Karney 2013)
        assert row["geodesic"] == pytest.approx(geod_area(DISTRICTS[row["id"]]), rel=1e-6)


def test_csv_points__coverage_zones_through_prefixed_open_options(capsys, tmp_path):
    """Clinic points from a CSV become geodesic circles of their reach: an isolated circle's share of a box.

    Reference: the circle areamc builds is the n-gon inscribed in the geodesic circle, area
    (n/2) r^2 sin(2 pi/n) to within (r/R)^2 (common practice; R the Earth's radius, r <= 3 km here);
    the box's area is pyproj.Geod's.
    """
    regions = tmp_path / "regions.gpkg"
    schema = {"geometry": "Polygon", "properties": {"region": "str"}}
    with fiona.open(regions, "w", driver="GPKG", crs="EPSG:4326", schema=schema) as dst:
        dst.write({"geometry": mapping(DISTRICTS["N1"]), "properties": {"region": "N1"}})
    path = clinics_csv(tmp_path)
    doc = run_json(capsys, ["coverage", regions, path, "--regions-id-field", "region", "--zones-id-field", "clinic",
                            "--zones-open-option", "X_POSSIBLE_NAMES=lon", "--zones-open-option",
                            "Y_POSSIBLE_NAMES=lat", "--zones-input-crs", "EPSG:4326", "--radius-field", "reach_m",
                            "--circle-vertices", "256", *FAST])
    r, n = CLINICS[0][3], 256
    expected = 0.5 * n * r * r * math.sin(2 * math.pi / n) / geod_area(DISTRICTS["N1"])
    (row,) = doc["results"]
    assert row["exact_share"] == pytest.approx(expected, rel=1e-4)


# ------------------------------------------------------------------------- refusals, table-driven


def zip_with_truncated_shapefile(folder) -> str:
    """A zipped Shapefile whose .shp lost its second half (the .shx still indexes both features)."""
    shp = write_shapefile(folder)
    data = (folder / "districts.shp").read_bytes()
    (folder / "districts.shp").write_bytes(data[: len(data) // 2 + 8])
    return zip_files(folder / "cut.zip", sorted(folder.glob("districts.*"))), shp


@pytest.fixture()
def inputs(tmp_path):
    f = tmp_path
    out = {"csv": clinics_csv(f), "dbf": None, "tif": str(f / "grid.tif"), "junk": str(f / "notes.xyz"),
           "broken": str(f / "broken.geojson"), "empty_dir": str(f / "empty"), "zip": str(f / "districts_shp.zip")}
    (f / "empty").mkdir()
    (f / "grid.tif").write_bytes(b"II*\x00" + bytes(60))
    (f / "notes.xyz").write_text("not a layer")
    (f / "broken.geojson").write_text('{"type": "FeatureCollection", "features": [')
    (f / "src").mkdir()
    shp = write_shapefile(f / "src")
    zip_files(f / "districts_shp.zip", sorted((f / "src").glob("districts.*")))
    (f / "table").mkdir()  # a .dbf without its .shp (beside one, GDAL opens the Shapefile)
    out["dbf"] = str(f / "table" / "districts.dbf")
    (f / "table" / "districts.dbf").write_bytes((f / "src" / "districts.dbf").read_bytes())
    out["regions"] = shp
    out["text_zip"] = zip_files(f / "readme.zip", [f / "notes.xyz"], ["readme.txt"])
    (f / "cut").mkdir()
    out["cut"], _ = zip_with_truncated_shapefile(f / "cut")
    return f, out


REFUSED = [
    ("CSV without open options", ["inspect", "{csv}"],
     r"{csv}: a CSV file whose rows have no geometry GDAL found; give --open-option X_POSSIBLE_NAMES=lon "
     r"--open-option Y_POSSIBLE_NAMES=lat .*--input-crs"),
    ("CSV zones without open options", ["coverage", "{regions}", "{csv}", "--radius", "1km"],
     r"give --zones-open-option X_POSSIBLE_NAMES=lon --zones-open-option Y_POSSIBLE_NAMES=lat .*--zones-input-crs"),
    ("open option without =", ["inspect", "{csv}", "--open-option", "lon"],
     r"--open-option: expected KEY=VALUE, such as X_POSSIBLE_NAMES=lon, got 'lon'"),
    ("zones open option without a name", ["coverage", "{regions}", "{csv}", "--zones-open-option", "=lon"],
     r"--zones-open-option: '' is not an open option name"),
    ("option the driver lacks", ["inspect", "{csv}", "--open-option", "X_NAMES=lon"],
     r"{csv}: the CSV driver has no open option X_NAMES \(--open-option\); its open options: .*X_POSSIBLE_NAMES"),
    ("one option given twice", ["inspect", "{csv}", "--open-option", "X_POSSIBLE_NAMES=lon",
                                "--open-option", "x_possible_names=lat"],
     r"--open-option: X_POSSIBLE_NAMES given twice \('lon' and 'lat'\)"),
    ("encoding as an open option", ["inspect", "{regions}", "--open-option", "ENCODING=latin-1"],
     r"--open-option: ENCODING: give the text encoding with --input-encoding instead"),
    ("density open option without =", ["integrate", "{regions}", "--density", "{regions}", "--count-field", "homes",
                                       "--density-open-option", "nope"], r"--density-open-option: expected KEY=VALUE"),
    ("open option for an expression", ["integrate", "{regions}", "--density", "1e-4", "--density-open-option",
                                       "A=1"], r"--density-open-option: open options serve a block layer"),
    ("missing zip", ["area", "{f}/nope.zip"], r"{f}/nope\.zip: no such file$"),
    ("zip:// of a missing archive", ["area", "zip://{f}/nope.zip"], r"zip://.*nope\.zip: no such file \(no archive"),
    ("member not in the archive", ["area", "/vsizip/{zip}/other.shp"],
     r"the archive .*districts_shp\.zip holds no 'other\.shp' \(it holds: districts\.cpg, districts\.dbf"),
    ("archive without vectors", ["area", "{text_zip}"],
     r"{text_zip}: the archive holds no file GDAL reads as vectors \(it holds: readme\.txt\)"),
    ("truncated Shapefile in a zip", ["area", "{cut}"],
     r"{cut} \(districts\.shp\): truncated or damaged: its \.shx indexes 2 features, but feature 0 \(bytes 100"),
    ("URL that does not answer", ["area", "https://127.0.0.1:9/zones.gpkg"],
     r"https://127\.0\.0\.1:9/zones\.gpkg: a network path GDAL could not open through /vsicurl/: check the address"),
    ("raster as a vector input", ["area", "{tif}"], r"{tif}: a raster \(\.tif\), not a vector layer"),
    ("unknown format", ["area", "{junk}"], r"{junk}: not in a vector format GDAL reads \(extension \.xyz\)"),
    ("damaged GeoJSON", ["area", "{broken}"],
     r"{broken}: GDAL cannot read it as GeoJSON, the format of its extension \.geojson: the file may be truncated"),
    ("a .dbf alone", ["area", "{dbf}"], r"{dbf}: a Shapefile's attribute table alone, without geometry; give the \.shp"),
    ("a folder without layers", ["area", "{empty_dir}"], r"{empty_dir}: is a folder, not a vector file"),
]


@pytest.mark.parametrize("case, argv, match", REFUSED, ids=[c[0] for c in REFUSED])
def test_unreadable_input__one_line_naming_path_format_and_remedy(capsys, inputs, case, argv, match):
    folder, paths = inputs
    paths = {**paths, "f": str(folder)}
    names = {k: re.escape(v) for k, v in paths.items()}
    argv = [a.format(**paths) for a in argv]
    options = ["-q"] if argv[0] == "inspect" else FAST
    assert_refused(capsys, [argv[0], *options, *argv[1:]], match.format(**names), folder)


def test_parquet_without_the_extra__says_what_to_install(capsys, tmp_path, monkeypatch):
    path = tmp_path / "zones.parquet"
    path.write_bytes(b"PAR1" + bytes(16) + b"PAR1")
    monkeypatch.setitem(sys.modules, "geopandas", None)  # as if areamc[parquet] were not installed
    monkeypatch.setattr(load, "_gdal_has_driver", lambda name: False)
    assert_refused(capsys, ["area", *FAST, str(path)], rf"{re.escape(str(path))}: a GeoParquet file, and neither "
                   r"GDAL here reads Parquet: install areamc\[parquet\]", tmp_path)


def test_open_options__library_names_the_parameter():
    with pytest.raises(OptionError, match=r"^open_options: expected KEY=VALUE"):
        parse_open_options(["lon"])
    assert parse_open_options({"keep_geom_columns": False, "x_possible_names": "lon"}) == {
        "KEEP_GEOM_COLUMNS": "NO", "X_POSSIBLE_NAMES": "lon"}
    assert parse_open_options(None) == {}


def test_reader_variable__unknown_value__refused(monkeypatch, tmp_path):
    monkeypatch.setenv(READER_VARIABLE, "gdal")
    with pytest.raises(OptionError, match=r"AREAMC_READER='gdal': choose one of auto, fiona, pyogrio"):
        read_layer(write_shapefile(tmp_path))


# --------------------------------------------------------------------------------- the two readers


def reader_files(folder) -> list[tuple[str, dict]]:
    """Layers of several drivers and field types: (path, read_layer keywords)."""
    files = [(write_shapefile(folder), {"id_field": "district"})]
    gpkg = folder / "mixed.gpkg"
    schema = {"geometry": "Unknown", "properties": {"name": "str", "count": "int", "weight": "float"}}
    with fiona.open(gpkg, "w", driver="GPKG", crs="EPSG:32632", schema=schema, layer="mixed") as dst:
        dst.write({"geometry": mapping(box(600_000, 5_200_000, 601_000, 5_201_500)),
                   "properties": {"name": "a", "count": 3, "weight": 0.5}})
        dst.write({"geometry": None, "properties": {"name": "none", "count": 4, "weight": 1.5}})
        dst.write({"geometry": mapping(Point(600_500, 5_200_500)), "properties": {"name": "p", "count": 5,
                                                                                 "weight": 2.5}})
        dst.write({"geometry": mapping(shapely.MultiPolygon([box(602_000, 5_200_000, 602_500, 5_200_500),
                                                             box(603_000, 5_200_000, 603_500, 5_200_400)])),
                   "properties": {"name": None, "count": 6, "weight": 3.5}})
        dst.write({"geometry": {"type": "Polygon", "coordinates": [[(0, 0, 5), (10, 0, 5), (10, 10, 5), (0, 10, 5),
                                                                      (0, 0, 5)]]},
                   "properties": {"name": "z", "count": 7, "weight": 4.5}})
        dst.write({"geometry": mapping(shapely.Polygon([(604_000, 5_200_000), (604_100, 5_200_100),
                                                        (604_100, 5_200_000), (604_000, 5_200_100)])),
                   "properties": {"name": "bowtie", "count": 8, "weight": 5.5}})
    files.append((str(gpkg), {"kind": "any"}))
    for name, driver, options in (("zones.geojson", "GeoJSON", {"id_field": "zone"}), ("zones.fgb", "FlatGeobuf", {})):
        with fiona.open(folder / name, "w", driver=driver, crs="EPSG:4326",
                        schema={"geometry": "Polygon", "properties": {"zone": "str"}}) as dst:
            for key, geom in DISTRICTS.items():
                dst.write({"geometry": mapping(geom), "properties": {"zone": key}})
        files.append((str(folder / name), options))
    latin = folder / "names.shp"
    with fiona.open(latin, "w", driver="ESRI Shapefile", crs="EPSG:4326", encoding="ISO-8859-1",
                    schema={"geometry": "Polygon", "properties": {"name": "str"}}) as dst:
        dst.write({"geometry": mapping(DISTRICTS["N1"]), "properties": {"name": "Zürich"}})
    (folder / "names.cpg").write_text("UTF-8")
    files.append((str(latin), {"encoding": "latin-1", "id_field": "name"}))
    files.append((clinics_csv(folder), {"kind": "point", "input_crs": "EPSG:4326", "open_options": {
        "X_POSSIBLE_NAMES": "lon", "Y_POSSIBLE_NAMES": "lat", "AUTODETECT_TYPE": "YES"}}))
    return files


@pytest.mark.skipif(not HAS_PYOGRIO, reason="pyogrio not installed (pip install 'areamc[pyogrio]')")
def test_readers__fiona_and_pyogrio__identical_layers(tmp_path, monkeypatch):
    """Every layer of reader_files read both ways.  pyogrio gives the records itself, except for the
    Shapefile read with an encoding its .cpg contradicts (pyogrio decodes by the .cpg, fails, and
    hands the layer back to fiona)."""
    used = []
    records = load._pyogrio_records
    monkeypatch.setattr(load, "_pyogrio_records", lambda *a: used.append(records(*a) is not None) or records(*a))
    for path, keywords in reader_files(tmp_path):
        layers = {}
        for name in ("fiona", "pyogrio"):
            monkeypatch.setenv(READER_VARIABLE, name)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                layers[name] = read_layer(path, **keywords)
        assert same_layer(layers["fiona"], layers["pyogrio"]), path
    assert used == [True, True, True, True, False, True]


@pytest.mark.skipif(not HAS_PYOGRIO, reason="pyogrio not installed (pip install 'areamc[pyogrio]')")
def test_readers__nulls_and_dates__handed_back_to_fiona(tmp_path):
    """pyogrio gives NaN for a null number and numpy dates; such layers are read by fiona instead."""
    path = tmp_path / "typed.gpkg"
    schema = {"geometry": "Polygon", "properties": {"count": "int", "day": "date"}}
    with fiona.open(path, "w", driver="GPKG", crs="EPSG:4326", schema=schema) as dst:
        dst.write({"geometry": mapping(DISTRICTS["N1"]), "properties": {"count": None, "day": "2026-12-02"}})
    for fields in ((("count", "int"),), (("day", "date"),)):
        assert load._pyogrio_records(str(path), "typed", None, {}, fields, 1) is None
    assert load._pyogrio_records(str(path), "typed", None, {}, (("count", "int"), ("day", "date")), 1) is None


@pytest.mark.skipif(not HAS_PYOGRIO, reason="pyogrio not installed (pip install 'areamc[pyogrio]')")
def test_readers__auto__pyogrio_only_from_the_threshold(tmp_path, monkeypatch):
    path = write_shapefile(tmp_path)
    calls = []
    records = load._pyogrio_records
    monkeypatch.setattr(load, "_pyogrio_records", lambda *a: calls.append(a[1]) or records(*a))
    monkeypatch.delenv(READER_VARIABLE, raising=False)
    read_layer(path)
    assert calls == []  # 2 features: fiona
    monkeypatch.setattr(load, "PYOGRIO_MIN_FEATURES", 2)
    read_layer(path)
    assert calls == ["districts"]


@pytest.mark.parametrize("reader", READERS, indirect=True)
def test_damaged_files__same_refusal_whichever_reader(capsys, tmp_path, reader):
    """tests/test_cli_inputs.py's damaged files, read with the reader chosen: the same one-line refusals."""
    import test_cli_inputs as cases

    cut_dbf, latin = cases.truncated_dbf(tmp_path), cases.latin1_shapefile(tmp_path)
    assert_refused(capsys, ["area", *FAST, cut_dbf], rf"{re.escape(cut_dbf)}: truncated or damaged file: GDAL "
                   r"failed after feature 0: .*DBF", tmp_path)
    assert_refused(capsys, ["area", *FAST, latin, "--id-field", "name"], rf"{re.escape(latin)}: feature 0: "
                   r"attribute text cannot be decoded .*--input-encoding, for example latin-1", tmp_path)


# ---------------------------------------------------------------------------- GeoParquet (the extra)


@needs_parquet
def test_geoparquet__read_with_its_crs_and_columns(capsys, tmp_path):
    frame = geopandas.GeoDataFrame({"district": list(DISTRICTS), "homes": [100, 200]},
                                   geometry=list(DISTRICTS.values()), crs="EPSG:4326")
    path = str(tmp_path / "districts.parquet")
    frame.to_parquet(path)
    layer = read_layer(path, id_field="district")
    assert layer.layer == "districts" and layer.ids == ("N1", "N2") and layer.crs.to_epsg() == 4326
    assert [p["homes"] for p in layer.properties] == [100, 200] and type(layer.properties[0]["homes"]) is int
    assert list_layers(path) == ["districts"]
    doc = run_json(capsys, ["area", path, "--id-field", "district", *FAST])
    for row in doc["results"]:  # pyproj.Geod (Karney 2013)
        assert row["geodesic"] == pytest.approx(geod_area(DISTRICTS[row["id"]]), rel=1e-6)


@needs_parquet
def test_geoparquet__plain_parquet_without_geo_metadata__refused(capsys, tmp_path):
    import pyarrow as pa
    import pyarrow.parquet as pq

    path = tmp_path / "table.parquet"
    pq.write_table(pa.table({"id": ["a"], "wkb": [shapely.to_wkb(DISTRICTS["N1"])]}), path)
    assert_refused(capsys, ["area", *FAST, str(path)], r"table\.parquet: a Parquet file without GeoParquet metadata",
                   tmp_path)


# -------------------------------------------------------------------------- GeoDataFrames and memory


@needs_geopandas
def test_geodataframe__attributes_kept_typed_and_ids_from_index_or_field():
    frame = geopandas.GeoDataFrame(
        {"district": ["N1", "N2"], "homes": np.array([100, 200], dtype=np.int64), "share": [0.5, np.nan],
         "surveyed": geopandas.pd.to_datetime(["2026-01-02", None])},
        geometry=list(DISTRICTS.values()), crs="EPSG:4326", index=[7, 9])
    layer = read_layer(frame)
    assert layer.path == "GeoDataFrame" and layer.ids == ("7", "9") and layer.crs.to_epsg() == 4326
    first, second = layer.properties
    assert first == {"district": "N1", "homes": 100, "share": 0.5, "surveyed": "2026-01-02T00:00:00"}
    assert type(first["homes"]) is int and second["share"] is None and second["surveyed"] is None
    assert dict(layer.fields) == {"district": "str", "homes": "int", "share": "float", "surveyed": "datetime"}
    assert read_layer(frame, id_field="district").ids == ("N1", "N2")
    assert read_layer(frame.geometry).properties == ({}, {})


@needs_geopandas
def test_geodataframe__reach_field__zones_as_geodesic_circles():
    """Point zones with a reach column become n-gons inscribed in their geodesic circles.

    Reference: area (n/2) r^2 sin(2 pi/n) of the inscribed regular n-gon (common practice), against
    pyproj.Geod's area of the zone, within (r/R)^2 for the ellipsoid's curvature (R about 6,371 km).
    """
    frame = geopandas.GeoDataFrame({"clinic": [c[0] for c in CLINICS], "reach_m": [c[3] for c in CLINICS]},
                                   geometry=[Point(c[1], c[2]) for c in CLINICS], crs="EPSG:4326")
    zones = read_zones(frame, id_field="clinic", radius_field="reach_m", vertices=256)
    assert zones.ids == ("C1", "C2", "C3") and zones.reach_circles == 3
    for geom, (_, _, _, r) in zip(zones.geometries, CLINICS):
        n = 256
        assert abs(GEOD.geometry_area_perimeter(geom)[0]) == pytest.approx(0.5 * n * r * r * math.sin(2 * math.pi / n),
                                                                           rel=1e-6)
    with pytest.raises(LayerError, match=r"radius_field 'reach' is not a field; fields: clinic, reach_m") as err:
        read_zones(frame, radius_field="reach")
    assert "--" not in str(err.value)


@needs_geopandas
@pytest.mark.parametrize("case, call, error, match", [
    ("no CRS", lambda: read_layer(geopandas.GeoDataFrame(geometry=[DISTRICTS["N1"]])), CRSError,
     r"^GeoDataFrame: the GeoDataFrame declares no CRS; state it with input_crs"),
    ("unknown id column", lambda: read_layer(geopandas.GeoDataFrame({"a": [1]}, geometry=[DISTRICTS["N1"]],
                                                                    crs=4326), id_field="b"),
     LayerError, r"^GeoDataFrame: id_field 'b' is not a column; columns: a"),
    ("a layer name", lambda: read_layer(geopandas.GeoSeries([DISTRICTS["N1"]], crs=4326), layer="x"), OptionError,
     r"^layer: a GeoSeries is read from memory and takes no layer"),
    ("a pandas DataFrame", lambda: read_layer(geopandas.pd.DataFrame({"a": [1]})), OptionError,
     r"^path: a pandas DataFrame holds no geometries; make it a geopandas GeoDataFrame"),
    ("a list", lambda: read_layer([DISTRICTS["N1"]]), OptionError,
     r"^path: expected a file path, a GeoDataFrame or a GeoSeries, got list"),
])
def test_memory_inputs__refused_naming_the_parameter(case, call, error, match):
    with pytest.raises(error, match=match):
        call()


@needs_geopandas
def test_geodataframe__input_crs_overrides_with_a_warning():
    frame = geopandas.GeoDataFrame(geometry=[DISTRICTS["N1"]], crs="EPSG:4326")
    with pytest.warns(UserWarning, match=r"input_crs 'WGS 84 / Pseudo-Mercator' overrides the GeoDataFrame's CRS"):
        assert read_layer(frame, input_crs="EPSG:3857").crs.to_epsg() == 3857


def test_layer_from_geometries__properties_kept_for_point_zones():
    points = [Point(lon, lat) for _, lon, lat, _ in CLINICS]
    layer = layer_from_geometries(points, "EPSG:4326", kind="point", ids=[c[0] for c in CLINICS],
                                  properties=[{"reach_m": np.float64(r)} for *_, r in CLINICS])
    assert layer.properties[0] == {"reach_m": 3000.0} and type(layer.properties[0]["reach_m"]) is float
    assert layer.fields == (("reach_m", "float"),)
    zones = zones_from_points(layer, radius_field="reach_m", vertices=256)
    n, r = 256, CLINICS[1][3]  # inscribed n-gon area (common practice), against pyproj.Geod
    assert abs(GEOD.geometry_area_perimeter(zones.geometries[1])[0]) == pytest.approx(
        0.5 * n * r * r * math.sin(2 * math.pi / n), rel=1e-6)
    with pytest.raises(OptionError, match=r"^geometries: properties holds 1 records for 3 geometries"):
        layer_from_geometries(points, "EPSG:4326", kind="point", properties=[{}])
    with pytest.raises(OptionError, match=r"properties\[0\] is a int, not a mapping"):
        layer_from_geometries(points[:1], "EPSG:4326", kind="point", properties=[3])
