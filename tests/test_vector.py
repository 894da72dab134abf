"""Tests of ``areamc.vector``: feature output to GeoPackage and GeoJSON.

Every file is read back with fiona (GDAL/OGR), an independent reader: feature count, layer
name, attribute values and types, CRS (compared with pyproj ``CRS.equals``), and geometry
(shapely ``equals_exact`` against the input).  GeoPackage stores geometries as WKB with IEEE 754
doubles (OGC GeoPackage Encoding Standard [memory]), so coordinates come back exactly; GDAL's
GeoJSON writer prints up to 17 significant digits by default [memory], so a tolerance of 1e-9 of
a degree (about 0.1 mm) or 1e-6 m is used for both (common practice).  A failed write must leave neither the target
nor any ``.areamc-*`` temporary file (nor SQLite ``-wal``/``-shm``/``-journal`` files).
"""

from __future__ import annotations

import os

import fiona
import numpy as np
import pyproj
import pytest
import shapely
from shapely.geometry import MultiPolygon, Polygon, box

from areamc.errors import OptionError
from areamc.vector import VECTOR_DRIVERS, vector_driver, write_features

LONLAT_GEOMETRIES = [
    box(10.0, 47.0, 10.5, 47.5),
    Polygon(
        [(11.0, 47.0), (11.6, 47.0), (11.6, 47.4), (11.0, 47.4)],
        holes=[[(11.1, 47.1), (11.3, 47.1), (11.3, 47.3), (11.1, 47.3)]],
    ),
    MultiPolygon([box(12.0, 47.0, 12.3, 47.2), Polygon([(12.5, 47.0), (12.9, 47.0), (12.7, 47.35)])]),
]
_TO_3035 = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:3035", always_xy=True)

ROWS = [
    {"id": "R01", "estimate": 1.5, "points": 20_000, "flagged": True, "exact": None, "population": 3_000_000_000},
    {"id": "R02", "estimate": 2.25, "points": 4, "flagged": False, "exact": 2.0, "population": 12},
    {"id": "R03", "estimate": np.float64(0.125), "points": np.int64(7), "flagged": np.bool_(True), "exact": 0.5, "population": 0},
]


def laea_geometries():
    """The same shapes in ETRS89-LAEA metres (EPSG:3035), transformed here with pyproj."""
    return [shapely.transform(g, _TO_3035.transform, interleaved=False) for g in LONLAT_GEOMETRIES]


def files_in(folder) -> list[str]:
    return sorted(os.listdir(folder))


def read_back(path):
    """(layer names, crs, schema properties, [(properties, shapely geometry)]) read with fiona."""
    layers = fiona.listlayers(str(path))
    with fiona.open(str(path)) as src:
        crs = pyproj.CRS.from_wkt(src.crs.to_wkt())
        props = dict(src.schema["properties"])
        features = [(dict(f.properties), shapely.geometry.shape(f.geometry)) for f in src]
    return layers, crs, props, features


# --- vector_driver ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    "path, driver",
    [
        ("out.gpkg", "GPKG"),
        ("OUT.GPKG", "GPKG"),
        ("dir.v1/result.geojson", "GeoJSON"),
        ("result.GeoJSON", "GeoJSON"),
        ("out.csv", None),
        ("out.json", None),
        ("out.shp", "ESRI Shapefile"),
        ("out.FGB", "FlatGeobuf"),
        ("out.parquet", None),
        ("out", None),
        ("out.gpkg/result.csv", None),
        ("", None),
        (None, None),
    ],
)
def test_vector_driver__by_extension(path, driver):
    assert vector_driver(path) == driver


def test_vector_driver__names_are_fiona_drivers():
    # The driver names must be ones fiona (GDAL) can write.
    for name in VECTOR_DRIVERS.values():
        assert "w" in fiona.supported_drivers.get(name, "")


# --- write_features: round trip ----------------------------------------------------------


@pytest.mark.parametrize("ext", [".gpkg", ".geojson"])
@pytest.mark.parametrize("epsg", [4326, 3035])
def test_write_features__read_back_with_fiona(tmp_path, ext, epsg):
    geoms = LONLAT_GEOMETRIES if epsg == 4326 else laea_geometries()
    path = tmp_path / f"out{ext}"
    write_features(str(path), geoms, ROWS, pyproj.CRS.from_epsg(epsg), "areas")
    assert files_in(tmp_path) == [path.name]  # no temporary or SQLite side files left
    layers, crs, props, features = read_back(path)
    if ext == ".gpkg":
        assert layers == ["areas"]
        assert crs.equals(pyproj.CRS.from_epsg(epsg), ignore_axis_order=True)  # the CRS as given
        expected, tolerance = geoms, (1e-9 if epsg == 4326 else 1e-6)
    else:
        # RFC 7946 §4: GeoJSON is lon/lat on WGS84 (GDAL labels it OGC:CRS84, lon/lat order); a projected
        # layer comes back as pyproj transforms it (GDAL writes 7 decimals under RFC7946, about 1 cm [memory])
        assert crs.equals(pyproj.CRS.from_epsg(4326), ignore_axis_order=True)
        expected, tolerance = LONLAT_GEOMETRIES, 2e-7
    # schema: field order and types as the rows
    assert list(props) == ["id", "estimate", "points", "flagged", "exact", "population"]
    assert props["id"] == "str" and props["estimate"] == "float" and props["exact"] == "float"
    assert props["points"].startswith("int") and props["flagged"] == "bool"
    assert props["population"].startswith("int")
    # features: count, values, Python types, geometry
    assert len(features) == 3
    for (got, geom), row, source in zip(features, ROWS, expected):
        assert got["id"] == row["id"]
        assert type(got["estimate"]) is float and got["estimate"] == float(row["estimate"])
        assert type(got["points"]) is int and got["points"] == int(row["points"])
        assert got["flagged"] is bool(row["flagged"])  # a boolean field (GeoPackage BOOLEAN, GeoJSON true/false)
        assert got["exact"] == row["exact"]
        assert got["population"] == row["population"]  # 3e9 needs a 64-bit integer field
        # polygons are written as MultiPolygons (GDAL's RFC 7946 writer gives a one-part one as a Polygon)
        assert geom.geom_type in ("MultiPolygon", source.geom_type)
        assert shapely.equals_exact(shapely.normalize(shapely.MultiPolygon(shapely.get_parts(geom))),
                                    shapely.normalize(shapely.MultiPolygon(shapely.get_parts(source))),
                                    tolerance=tolerance), (geom.wkt, source.wkt)
        assert geom.area == pytest.approx(source.area, rel=1e-5)
    assert len(shapely.get_parts(features[1][1])[0].interiors) == 1  # the hole survives


def test_write_features__overwrites_an_existing_file(tmp_path):
    path = tmp_path / "out.gpkg"
    crs = pyproj.CRS.from_epsg(4326)
    write_features(str(path), LONLAT_GEOMETRIES, ROWS, crs, "areas")
    write_features(str(path), LONLAT_GEOMETRIES[:1], [{"id": "only", "estimate": 9.0}], crs, "totals")
    layers, _, props, features = read_back(path)
    assert layers == ["totals"] and list(props) == ["id", "estimate"]
    assert [f[0] for f in features] == [{"id": "only", "estimate": 9.0}]
    assert files_in(tmp_path) == ["out.gpkg"]


@pytest.mark.parametrize("ext", [".gpkg", ".geojson"])
def test_write_features__no_rows__empty_layer(tmp_path, ext):
    path = tmp_path / f"empty{ext}"
    write_features(str(path), [], [], pyproj.CRS.from_epsg(4326), "areas")
    _, crs, props, features = read_back(path)
    assert features == [] and props == {}
    assert crs.equals(pyproj.CRS.from_epsg(4326), ignore_axis_order=True)
    assert files_in(tmp_path) == [path.name]


def test_write_features__all_none_field_is_float(tmp_path):
    path = tmp_path / "out.gpkg"
    write_features(str(path), LONLAT_GEOMETRIES[:2], [{"exact": None}, {"exact": None}], pyproj.CRS.from_epsg(4326), "a")
    _, _, props, features = read_back(path)
    assert props == {"exact": "float"} and [f[0]["exact"] for f in features] == [None, None]


@pytest.mark.parametrize("ext", [".gpkg", ".geojson"])
def test_write_features__mixed_string_and_number_field__kept_as_text(tmp_path, ext):
    path = tmp_path / f"mixed{ext}"
    rows = [{"id": "a"}, {"id": 3}, {"id": 2.5}]
    write_features(str(path), LONLAT_GEOMETRIES, rows, pyproj.CRS.from_epsg(4326), "areas")
    _, _, props, features = read_back(path)
    assert props["id"] == "str"
    assert [f[0]["id"] for f in features] == ["a", "3", "2.5"]


# --- write_features: failures leave nothing behind -------------------------------------------


def _fail_on_second_feature(monkeypatch):
    """fiona's feature write fails on the second feature, after the file is open and one feature is in."""
    real_write = fiona.Collection.write
    calls = []

    def write(self, record):
        calls.append(record)
        if len(calls) == 2:
            raise ValueError("simulated failure while writing")
        return real_write(self, record)

    monkeypatch.setattr(fiona.Collection, "write", write)


@pytest.mark.parametrize("ext", [".gpkg", ".geojson", ".shp", ".fgb"])
def test_write_features__failure_while_writing__no_file_left(tmp_path, monkeypatch, ext):
    # a Shapefile's .shx/.dbf/.prj/.cpg and the metadata sidecar of a Shapefile or FlatGeobuf go too
    _fail_on_second_feature(monkeypatch)
    with pytest.raises(ValueError, match="simulated"):
        write_features(str(tmp_path / f"out{ext}"), LONLAT_GEOMETRIES, ROWS, pyproj.CRS.from_epsg(4326), "areas")
    assert files_in(tmp_path) == []


def test_write_features__failure__previous_output_kept(tmp_path, monkeypatch):
    path = tmp_path / "out.gpkg"
    crs = pyproj.CRS.from_epsg(4326)
    write_features(str(path), LONLAT_GEOMETRIES, ROWS, crs, "areas")
    before = path.read_bytes()
    _fail_on_second_feature(monkeypatch)
    with pytest.raises(ValueError, match="simulated"):
        write_features(str(path), LONLAT_GEOMETRIES[:2], ROWS[:2], crs, "areas")
    assert path.read_bytes() == before
    assert files_in(tmp_path) == ["out.gpkg"]
    monkeypatch.undo()
    assert len(read_back(path)[3]) == 3


def test_write_features__null_geometry__written_as_null(tmp_path):
    # a row without a geometry is a feature with a null geometry (GeoPackage: NULL), not a failure
    path = tmp_path / "out.gpkg"
    write_features(str(path), [LONLAT_GEOMETRIES[0], None], ROWS[:2], pyproj.CRS.from_epsg(4326), "areas")
    with fiona.open(str(path)) as src:
        geoms = [f.geometry for f in src]
    assert geoms[0] is not None and geoms[1] is None


@pytest.mark.parametrize("name", ["out.parquet", "out.csv", "out", "out.gpkg.txt"])
def test_write_features__unknown_extension__option_error_no_file(tmp_path, name):
    with pytest.raises(OptionError):
        write_features(str(tmp_path / name), LONLAT_GEOMETRIES, ROWS, pyproj.CRS.from_epsg(4326), "areas")
    assert files_in(tmp_path) == []


def test_write_features__rename_fails__no_temporary_left(tmp_path):
    target = tmp_path / "out.gpkg"
    target.mkdir()
    (target / "keep").write_text("x")  # a folder in the way: os.replace must fail
    with pytest.raises(OSError):
        write_features(str(target), LONLAT_GEOMETRIES, ROWS, pyproj.CRS.from_epsg(4326), "areas")
    assert files_in(tmp_path) == ["out.gpkg"]
    assert files_in(target) == ["keep"]


def test_write_features__interrupted__no_temporary_left(tmp_path, monkeypatch):
    def interrupted(src, dst):
        raise KeyboardInterrupt

    monkeypatch.setattr(os, "replace", interrupted)
    with pytest.raises(KeyboardInterrupt):
        write_features(str(tmp_path / "out.gpkg"), LONLAT_GEOMETRIES, ROWS, pyproj.CRS.from_epsg(4326), "areas")
    monkeypatch.undo()
    assert files_in(tmp_path) == []
