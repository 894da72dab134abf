"""Shared geometries and fixtures for areamc's tests.

The shapes below are test inputs, not reference data: every expected value in
the tests comes from an outside source (a published formula or worked
example, pyproj.Geod, shapely or scipy), named beside the check.  All shapes
are in WGS84 longitude/latitude degrees.
"""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest
from shapely.geometry import MultiPolygon, Polygon, box
from shapely.geometry.polygon import orient

from areamc.load import layer_from_geometries
from areamc.project import project_layer

# --- boxes (west, south, east, north); their WGS84 areas follow from the closed form ----------
# --- A = (a²/2) Δλ (q(φ2) − q(φ1)), Snyder 1987, USGS Prof. Paper 1395, eq. 3-12 -------------
EQUATOR_BOX = (0.0, 0.0, 1.0, 1.0)
MID_LATITUDE_BOX = (0.0, 45.0, 1.0, 46.0)
HIGH_LATITUDE_BOX = (0.0, 80.0, 1.0, 81.0)
TEN_DEGREE_BOX = (10.0, 40.0, 20.0, 50.0)

# --- polygons with edges that are straight lines in lon/lat ---------------------------------
#: A notched quadrilateral about 60 km across (concave vertex at 10.4E 47.25N).
CONCAVE = Polygon([(10.0, 47.0), (10.8, 47.0), (10.4, 47.25), (10.8, 47.5), (10.0, 47.5)])
#: A box with two holes; the holes are given counter-clockwise, like the shell, on purpose
#: (geodesic areas are signed, so the tool must orient rings itself).
HOLED = Polygon(
    [(11.0, 47.0), (11.6, 47.0), (11.6, 47.4), (11.0, 47.4)],
    holes=[
        [(11.1, 47.1), (11.3, 47.1), (11.3, 47.3), (11.1, 47.3)],
        [(11.4, 47.1), (11.5, 47.1), (11.45, 47.3)],
    ],
)
#: Three separate parts: a box, a triangle and a concave "L".
MULTI = MultiPolygon(
    [
        box(12.0, 47.0, 12.3, 47.2),
        Polygon([(12.5, 47.0), (12.9, 47.0), (12.7, 47.35)]),
        Polygon([(12.0, 47.4), (12.6, 47.4), (12.6, 47.5), (12.1, 47.5), (12.1, 47.7), (12.0, 47.7)]),
    ]
)
#: A concave polygon about 13 x 8.5 degrees (the size of a large European country).
COUNTRY = Polygon(
    [(-5.0, 43.0), (3.0, 42.5), (8.0, 44.0), (7.0, 49.0), (2.0, 51.0), (-4.0, 48.5), (-1.0, 46.0)]
)


def lonlat_box(bounds) -> Polygon:
    """A lon/lat box given by its 4 corners only (the tool must densify it)."""
    return box(*bounds)


@pytest.fixture(scope="session")
def geod() -> pyproj.Geod:
    """pyproj.Geod on WGS84 (Karney 2013), built here, independently of areamc.project.WGS84."""
    return pyproj.Geod(ellps="WGS84")


@pytest.fixture(scope="session")
def reference_geodesic_area(geod):
    """Return ``f(polygon, pieces)``: the WGS84 area of a lon/lat polygon whose edges are straight
    in lon/lat, each edge cut into `pieces` by linear interpolation, by pyproj.Geod (Karney 2013).

    This densifies on its own (numpy), not through areamc, so it can check the tool's densify step.
    """

    def ring_area(coords, pieces):
        xy = np.asarray(coords)[:, :2]
        t = np.arange(pieces) / pieces
        parts = [a + (b - a) * t[:, None] for a, b in zip(xy[:-1], xy[1:])]
        ring = np.vstack(parts)
        area, _ = geod.polygon_area_perimeter(ring[:, 0], ring[:, 1])
        return area

    def area(geom, pieces: int = 1000) -> float:
        polys = list(geom.geoms) if hasattr(geom, "geoms") else [geom]
        total = 0.0
        for poly in polys:
            poly = orient(poly, sign=1.0)  # Geod areas are signed: shell CCW, holes CW
            total += ring_area(poly.exterior.coords, pieces)
            total += sum(ring_area(r.coords, pieces) for r in poly.interiors)
        return abs(total)

    return area


@pytest.fixture(scope="session")
def project():
    """Return ``f(geoms, layer_crs="EPSG:4326", ids=None, **project_layer kwargs)`` -> ProjectedLayer.

    `layer_crs` is the CRS the geometries are given in; ``crs=`` (passed on to
    ``project_layer``) requests an equal-area plane.
    """

    def build(geoms, layer_crs="EPSG:4326", ids=None, **kwargs):
        layer = layer_from_geometries(list(geoms), layer_crs, ids=ids)
        return project_layer(layer, **kwargs)

    return build


@pytest.fixture(scope="session")
def small_features(project):
    """CONCAVE, HOLED and MULTI projected together onto the chosen plane."""
    return project([CONCAVE, HOLED, MULTI], ids=["concave", "holed", "multi"])


# --- helpers shared by several test files (plain functions: ``from conftest import ...``) ----------

#: The tool's default --densify of 1 km, in degrees of a geographic layer (1000 / 111 320).
STEP_DEG = 1000.0 / 111_320.0


def run_cli(capsys, argv) -> tuple[int, str, str]:
    """Run ``areamc ARGV`` in-process; return (exit status, stdout, stderr)."""
    from areamc.cli import main

    rc = main(list(argv))
    out, err = capsys.readouterr()
    return rc, out, err


def run_json(capsys, argv, expect: int = 0) -> dict:
    """Run ``areamc ARGV --format json`` and parse stdout; the exit status must be `expect`.

    Areas come in m², the plane's own unit that shapely's reference values are in, unless `argv`
    names ``--units`` (the commands' default is km2).
    """
    import json

    argv = [str(a) for a in argv]
    units = [] if "--units" in argv else ["--units", "m2"]
    rc, out, err = run_cli(capsys, [*argv, "--format", "json", *units])
    assert rc == expect, err
    return json.loads(out)


def to_plane(geoms, src_crs, doc, step=None) -> list:
    """Densify in the source CRS (1 km, with shapely), then project with pyproj to the plane named in
    a JSON result's metadata: an independent reconstruction of the tool's planar geometries."""
    import shapely

    if step is None:
        step = STEP_DEG if src_crs.is_geographic else 1000.0
    plane = pyproj.CRS.from_wkt(doc["plane"]["wkt"])
    trans = pyproj.Transformer.from_crs(src_crs, plane, always_xy=True)

    def move(xy):
        return np.column_stack(trans.transform(xy[:, 0], xy[:, 1]))

    return [shapely.transform(shapely.segmentize(g, step), move) for g in geoms]


def overlay_total(blocks, counts, region) -> float:
    """Areal weighting with shapely over every block (Goodchild & Lam 1980, Geo-Processing 1:297-312):
    Σ count_i |block_i ∩ region| / |block_i|."""
    import shapely

    inter = shapely.area(shapely.intersection(blocks, region))
    return float(np.sum(np.asarray(counts) * inter / shapely.area(blocks)))


def write_raster(path, data, *, west, north, dx, dy=None, crs="EPSG:4326", nodata=None, dtype="float64") -> str:
    """Write a one-band GeoTIFF with north-up cells of dx by dy (CRS units) with rasterio; return its path."""
    import rasterio
    import rasterio.transform

    data = np.asarray(data, dtype=dtype)
    transform = rasterio.transform.from_origin(west, north, dx, dy if dy is not None else dx)
    profile = dict(driver="GTiff", height=data.shape[0], width=data.shape[1], count=1, dtype=dtype,
                   transform=transform)
    if crs is not None:
        profile["crs"] = crs
    if nodata is not None:
        profile["nodata"] = nodata
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(data, 1)
    return str(path)


def mid_p_z(hits: int, n: int, p0: float) -> float:
    """Signed normal score of the two-sided mid-p binomial tail (Lancaster 1961, JASA 56:223-234):
    P = min(1, 2 min(P(X < h) + P(X = h)/2, P(X > h) + P(X = h)/2)) for X ~ Binomial(n, p0), and
    z = sign(h - n p0) * Phi^-1(1 - P/2); written out here with scipy.stats."""
    from scipy import stats

    half = 0.5 * stats.binom.pmf(hits, n, p0)
    low = stats.binom.cdf(hits - 1, n, p0) + half
    high = stats.binom.sf(hits, n, p0) + half
    p_two = min(1.0, 2 * min(low, high))
    score = stats.norm.isf(p_two / 2)
    return float(score if hits >= n * p0 else -score)


def wilson_by_quadratic(k, n, z):
    """Wilson (1927): the interval is the set of p with (p_hat - p)^2 <= z^2 p (1 - p) / n.

    Solved here as the quadratic (1 + z²/n) p² - (2 p_hat + z²/n) p + p_hat² = 0, a different
    route from the closed form areamc uses.
    """
    p_hat = k / n
    a = 1 + z * z / n
    b = -(2 * p_hat + z * z / n)
    c = p_hat * p_hat
    disc = math.sqrt(b * b - 4 * a * c)
    return (-b - disc) / (2 * a), (-b + disc) / (2 * a)


# --- bad input: one line, exit status 2, no traceback, nothing written, inputs untouched ----------


def checksums(folder) -> dict:
    """SHA-256 of every file under `folder` (path relative to it -> hex digest), links followed."""
    import hashlib
    import pathlib

    root = pathlib.Path(folder)
    return {str(p.relative_to(root)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(root.rglob("*")) if p.is_file()}


def assert_refused(capsys, argv, match: str, folder, status: int = 2) -> str:
    """Run ``areamc ARGV`` and check it refuses its input the way the brief asks.

    One line on stderr starting ``areamc: error:`` and matching the regular
    expression `match`; exit status `status`; nothing on stdout; no
    traceback; and every file under `folder` (where the test made its inputs
    and pointed any output) unchanged, with no file added or removed.
    Returns the error line.
    """
    import re

    before = checksums(folder)
    rc, out, err = run_cli(capsys, [str(a) for a in argv])
    lines = [line for line in err.splitlines() if line.startswith("areamc: error:")]
    assert rc == status, f"exit {rc}, stderr: {err}"
    assert out == "", out
    assert "Traceback" not in err, err
    assert len(lines) == 1, err
    assert re.search(match, lines[0]), lines[0]
    assert checksums(folder) == before, "files under the test folder changed"
    return lines[0]
