#!/usr/bin/env python3
"""Rebuild the invented "Vale County" demo data set in sample_data/.

Vale County is a fictional county. Every name, shape and number here is
made up: the district, town, zone, operator, clinic and reserve names are
coined words that name no real place, and the county's placement on the
globe is arbitrary (chosen only so that it sits well inside one UTM zone).
The script is deterministic (one numpy Generator with a fixed seed)
and rebuilds every output file from scratch:

    vale_county.gpkg            districts, service_zones, clinics, blocks (EPSG:4326)
    vale_districts.shp (+ .shx .dbf .prj .cpg)   districts (EPSG:4326)
    vale_districts.geojson      districts (EPSG:4326)
    vale_reserves_utm32n.gpkg   reserves (EPSG:32632, metres)
    vale_population.tif         population count per 0.01 degree cell (EPSG:4326)

Run from the repository root:

    python sample_data/make_sample_data.py

How it is built: all geometry is drawn in UTM zone 32N metres around the
county centre (10.6 E, 47.25 N). District and block boundaries come from
noding all line work once and polygonizing it, so neighbouring polygons share
exactly the same vertices. Those shared vertices are then projected to
lon/lat and rounded to 7 decimals by one pure function, so the tiling stays
exact (no gaps or overlaps) in the published EPSG:4326 files too.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

# Fixed timestamps inside the GeoPackages, so reruns give identical files.
os.environ.setdefault("OGR_CURRENT_DATE", "2026-12-01T00:00:00Z")

import fiona  # noqa: E402
import numpy as np  # noqa: E402
import pyproj  # noqa: E402
import rasterio  # noqa: E402
import shapely  # noqa: E402
from rasterio.transform import from_origin  # noqa: E402
from shapely.geometry import (  # noqa: E402
    LinearRing,
    LineString,
    MultiPoint,
    MultiPolygon,
    Point,
    Polygon,
    mapping,
)

OUT_DIR = Path(__file__).resolve().parent
SEED = 20261201

CENTRE_LON, CENTRE_LAT = 10.6, 47.25
CRS_LONLAT = "EPSG:4326"
CRS_UTM = "EPSG:32632"
LONLAT_DECIMALS = 7
UTM_DECIMALS = 2

GPKG_MAIN = "vale_county.gpkg"
SHP_BASE = "vale_districts"
GEOJSON = "vale_districts.geojson"
GPKG_RESERVES = "vale_reserves_utm32n.gpkg"
TIF_POP = "vale_population.tif"
SHP_SIDECARS = (".shp", ".shx", ".dbf", ".prj", ".cpg", ".qix", ".sbn", ".sbx")

BLOCK_CELL_M = 2300.0  # nominal census block grid spacing
MIN_BLOCK_FRACTION = 0.01  # faces below this share of a nominal block get merged
RASTER_RES_DEG = 0.01
RASTER_MARGIN_CELLS = 3
RASTER_NODATA = -1.0

_TO_LONLAT = pyproj.Transformer.from_crs(CRS_UTM, CRS_LONLAT, always_xy=True)
_TO_UTM = pyproj.Transformer.from_crs(CRS_LONLAT, CRS_UTM, always_xy=True)
CX, CY = _TO_UTM.transform(CENTRE_LON, CENTRE_LAT)  # county centre, UTM metres


def km(dx: float, dy: float) -> tuple[float, float]:
    """UTM coordinates of a point dx km east and dy km north of the centre."""
    return CX + dx * 1000.0, CY + dy * 1000.0


# ---------------------------------------------------------------------------
# Invented population density surface (people per km^2), shared by the
# census blocks and the raster.
# ---------------------------------------------------------------------------

# (name, dx km, dy km, peak density per km^2, sigma km)
TOWNS = (
    ("Vossimble", -1.5, -0.5, 2400.0, 2.2),
    ("Quorvindle", -19.0, 9.5, 1300.0, 1.6),
    ("Splendock Cross", 16.5, 10.5, 750.0, 1.3),
)
# small villages: (dx km, dy km, peak, sigma km)
VILLAGES = (
    (-8.0, 15.0, 180.0, 0.8),
    (6.0, 4.0, 220.0, 0.9),
    (9.0, -12.0, 160.0, 0.7),
    (23.0, -6.0, 140.0, 0.7),
    (-11.0, -14.0, 200.0, 0.8),
    (-26.0, 1.0, 120.0, 0.6),
    (20.0, 15.0, 150.0, 0.7),
    (2.0, -18.5, 130.0, 0.7),
)
RURAL_DENSITY = 22.0
# Thrumblewood Forest: ellipse (dx, dy, semi-axis a, semi-axis b [km], rotation deg).
# Density is exactly zero inside the ellipse and tapers back in by 1.35 x.
FOREST = (-20.0, -3.0, 6.5, 3.6, 25.0)


def _utm_offsets_km(lon, lat):
    lon = np.asarray(lon, dtype=float)
    lat = np.asarray(lat, dtype=float)
    x, y = _TO_UTM.transform(lon.ravel(), lat.ravel())
    dx = (np.asarray(x) - CX).reshape(lon.shape) / 1000.0
    dy = (np.asarray(y) - CY).reshape(lat.shape) / 1000.0
    return dx, dy


def forest_radius(dx, dy):
    """Normalised elliptical radius of Thrumblewood Forest (< 1 means inside)."""
    fx, fy, a, b, rot = FOREST
    t = math.radians(rot)
    u = (dx - fx) * math.cos(t) + (dy - fy) * math.sin(t)
    v = -(dx - fx) * math.sin(t) + (dy - fy) * math.cos(t)
    return np.sqrt((u / a) ** 2 + (v / b) ** 2)


def population_density(lon, lat):
    """Invented smooth population density (people per km^2) at lon/lat.

    Rural background with a gentle wave, three towns and a handful of villages
    as Gaussian bumps, and zero inside Thrumblewood Forest. Vectorised: lon and
    lat may be scalars or arrays of the same shape.
    """
    dx, dy = _utm_offsets_km(lon, lat)
    dens = RURAL_DENSITY * (
        1.0 + 0.45 * np.sin(dx / 7.0 + 0.4) * np.cos(dy / 9.0 - 0.3)
    )
    for _, tx, ty, peak, sigma in TOWNS:
        dens = dens + peak * np.exp(-((dx - tx) ** 2 + (dy - ty) ** 2) / (2 * sigma**2))
    for vx, vy, peak, sigma in VILLAGES:
        dens = dens + peak * np.exp(-((dx - vx) ** 2 + (dy - vy) ** 2) / (2 * sigma**2))
    r = forest_radius(dx, dy)
    taper = np.clip((r - 1.0) / 0.35, 0.0, 1.0)
    taper = taper * taper * (3.0 - 2.0 * taper)  # smoothstep
    return dens * taper


# ---------------------------------------------------------------------------
# geometry helpers
# ---------------------------------------------------------------------------


def wobbly_ring(cx, cy, a, b, rot_deg, rng, n=180, harmonics=(2, 3, 5, 7), amp=0.05, jitter=0.004):
    """Closed star-shaped ring: an ellipse with random low-frequency wobble."""
    th = np.linspace(0.0, 2.0 * np.pi, n, endpoint=False)
    r = a * b / np.sqrt((b * np.cos(th)) ** 2 + (a * np.sin(th)) ** 2)
    wob = np.ones_like(th)
    for k in harmonics:
        wob += (amp / math.sqrt(k)) * rng.uniform(0.5, 1.0) * np.sin(k * th + rng.uniform(0, 2 * np.pi))
    # smooth small-scale noise: white noise averaged over 5 neighbours (circular)
    noise = rng.normal(0.0, jitter, size=n)
    wob += sum(np.roll(noise, k) for k in range(-2, 3)) / math.sqrt(5.0)
    r = r * wob
    t = math.radians(rot_deg)
    x = r * np.cos(th)
    y = r * np.sin(th)
    xr = cx + x * math.cos(t) - y * math.sin(t)
    yr = cy + x * math.sin(t) + y * math.cos(t)
    return np.column_stack([xr, yr])


def wobbly_polygon(cx, cy, a, b, rot_deg, rng, **kw) -> Polygon:
    poly = Polygon(wobbly_ring(cx, cy, a, b, rot_deg, rng, **kw))
    assert poly.is_valid, "wobbly polygon is not valid"
    return poly


def orient(geom):
    """Exterior rings counter-clockwise, holes clockwise."""
    if hasattr(shapely, "orient_polygons"):
        return shapely.orient_polygons(geom, exterior_cw=False)
    from shapely.geometry.polygon import orient as _orient

    if isinstance(geom, Polygon):
        return _orient(geom, 1.0)
    if isinstance(geom, MultiPolygon):
        return MultiPolygon([_orient(p, 1.0) for p in geom.geoms])
    return geom


def _round_lonlat(coords: np.ndarray) -> np.ndarray:
    lon, lat = _TO_LONLAT.transform(coords[:, 0], coords[:, 1])
    return np.round(np.column_stack([lon, lat]), LONLAT_DECIMALS)


def to_lonlat(geom):
    """Project UTM geometry to lon/lat, round to 7 decimals, orient, validate.

    The projection + rounding is a pure per-vertex function, so vertices
    shared by neighbouring polygons stay identical.
    """
    out = shapely.transform(geom, _round_lonlat)
    out = shapely.remove_repeated_points(out)
    out = orient(out)
    if not out.is_valid:
        out = orient(shapely.set_precision(out, 10.0**-LONLAT_DECIMALS))
    assert out.is_valid, shapely.is_valid_reason(out)
    return out


def round_utm(geom):
    out = shapely.transform(geom, lambda c: np.round(c, UTM_DECIMALS))
    out = orient(shapely.remove_repeated_points(out))
    if not out.is_valid:
        out = orient(shapely.set_precision(out, 10.0**-UTM_DECIMALS))
    assert out.is_valid, shapely.is_valid_reason(out)
    return out


def polygon_parts(geom):
    return [g for g in shapely.get_parts(geom) if isinstance(g, Polygon) and not g.is_empty]


def faces_of(lines) -> list[Polygon]:
    """Node all line work once and polygonize it."""
    noded = shapely.unary_union(lines)
    return polygon_parts(shapely.polygonize([noded]))


def single(geom):
    """Return a Polygon if the geometry has one part, else a MultiPolygon."""
    parts = polygon_parts(geom)
    if len(parts) == 1:
        return parts[0]
    return MultiPolygon(parts)


# ---------------------------------------------------------------------------
# scenario
# ---------------------------------------------------------------------------

DISTRICTS = (
    # id, name, seed dx km, seed dy km
    ("D01", "Quorvindle Reach", -20.0, 9.0),
    ("D02", "Tansquillow Heath", -4.0, 13.0),
    ("D03", "Brumbletoe Hills", 15.0, 12.0),
    ("D04", "Vossimble", -1.0, -1.5),
    ("D05", "Plodwhistle Fen", 14.0, -3.0),
    ("D06", "Mossquibble", -19.0, -8.0),
    ("D07", "Droskelby Wold", 0.0, -15.0),
    ("D08", "Wendlequist Marches", 22.0, -14.0),
)
CONCAVE_DISTRICT = "D02"  # loses a hooked tongue of land to ...
TONGUE_OWNER = "D04"  # ... Vossimble
LAKE_DISTRICT = "D05"  # Quonkle Mere lies inside Plodwhistle Fen (a hole in it)
ISLAND_DISTRICT = "D08"  # Pibblenook Isle in the lake belongs to Wendlequist Marches


def build_county(rng):
    outline = wobbly_polygon(CX, CY, 30_000.0, 22_500.0, 4.0, rng, n=300, harmonics=(2, 3, 4, 5, 7, 9, 13), amp=0.07)
    lx, ly = km(14.5, -5.2)
    lake = wobbly_polygon(lx, ly, 2_300.0, 1_300.0, -20.0, rng, n=72, harmonics=(2, 3, 4), amp=0.08, jitter=0.01)
    ix, iy = lx + 500.0, ly - 150.0
    island = wobbly_polygon(ix, iy, 480.0, 300.0, 35.0, rng, n=28, harmonics=(2, 3), amp=0.08, jitter=0.01)
    assert lake.contains(island.buffer(200.0)), "island too close to the lake shore"
    assert outline.contains(lake.buffer(2000.0))
    return outline, lake, island


def wiggle_edge(line: LineString, rng, step=500.0, rel_amp=0.05, max_amp=1100.0) -> LineString:
    """Replace a straight Voronoi edge by a meandering line with the same
    end points (so edges still meet at the Voronoi vertices)."""
    (x0, y0), (x1, y1) = line.coords[0], line.coords[-1]
    length = math.hypot(x1 - x0, y1 - y0)
    n = max(2, int(math.ceil(length / step)))
    t = np.linspace(0.0, 1.0, n + 1)
    amp = min(rel_amp * length, max_amp)
    f1, f2 = rng.uniform(0.8, 1.6), rng.uniform(2.5, 4.0)
    p1, p2 = rng.uniform(0, 2 * np.pi, 2)
    off = amp * np.sin(np.pi * t) * (0.65 * np.sin(2 * np.pi * f1 * t + p1) + 0.35 * np.sin(2 * np.pi * f2 * t + p2))
    nx, ny = -(y1 - y0) / length, (x1 - x0) / length
    return LineString(np.column_stack([x0 + t * (x1 - x0) + off * nx, y0 + t * (y1 - y0) + off * ny]))


def build_districts(rng, outline, lake, island):
    seeds = np.array([km(dx, dy) for _, _, dx, dy in DISTRICTS])
    seeds = seeds + rng.uniform(-1500.0, 1500.0, size=seeds.shape)
    frame = shapely.box(*outline.buffer(5000.0).bounds)
    cells = shapely.get_parts(shapely.voronoi_polygons(MultiPoint(seeds), extend_to=frame))
    # match the Voronoi cells to their seeds (independent of output order)
    cell_of = [next(c for c in cells if c.contains(Point(s))) for s in seeds]
    edges = shapely.get_parts(shapely.voronoi_polygons(MultiPoint(seeds), extend_to=frame, only_edges=True))
    edges = [wiggle_edge(e, rng) for e in edges]  # each Voronoi edge is one straight segment

    # hooked tongue of land reaching from Vossimble north into Tansquillow Heath,
    # which makes Tansquillow Heath strongly concave
    ids = [d[0] for d in DISTRICTS]
    sb = seeds[ids.index(CONCAVE_DISTRICT)]
    sa = seeds[ids.index(TONGUE_OWNER)]
    mid = (sa + sb) / 2.0
    hook = LineString(
        [
            (mid[0] + 600.0, mid[1] - 1500.0),
            (mid[0] + 1000.0, mid[1] + 4500.0),
            (mid[0] - 500.0, mid[1] + 8600.0),
            (mid[0] - 5500.0, mid[1] + 9400.0),
            (mid[0] - 8000.0, mid[1] + 6000.0),
            (mid[0] - 6500.0, mid[1] + 3800.0),
        ]
    )
    tongue = hook.buffer(2600.0, quad_segs=6)
    # keep the tongue well away from Tansquillow Heath's other borders so that
    # the district stays in one piece
    b_cell, a_cell = cell_of[ids.index(CONCAVE_DISTRICT)], cell_of[ids.index(TONGUE_OWNER)]
    allowed = b_cell.buffer(-1500.0).union(a_cell.buffer(2500.0)).intersection(a_cell.union(b_cell))
    pieces = polygon_parts(tongue.intersection(allowed))
    tongue = max((g for g in pieces if g.intersects(a_cell)), key=lambda g: g.area)

    lines = [outline.exterior, lake.exterior, island.exterior, tongue.boundary] + edges
    faces = faces_of(lines)
    county = outline.difference(lake).union(island)

    groups: dict[str, list[Polygon]] = {i: [] for i in ids}
    for f in faces:
        p = f.representative_point()
        if not county.contains(p):
            continue  # outside the county or in the lake
        if island.contains(p):
            groups[ISLAND_DISTRICT].append(f)
            continue
        # the face belongs to the (straight) Voronoi cell it overlaps most
        d = ids[int(np.argmax([f.intersection(c).area for c in cell_of]))]
        if d == CONCAVE_DISTRICT and tongue.contains(p):
            d = TONGUE_OWNER
        groups[d].append(f)
    districts = {i: single(shapely.unary_union(groups[i])) for i in ids}
    for i, g in districts.items():
        assert g.is_valid, (i, shapely.is_valid_reason(g))
    assert not tongue.intersects(lake)
    return districts, county, seeds


def jittered_grid_lines(rng, bounds, cell):
    minx, miny, maxx, maxy = bounds
    nx = int(math.ceil((maxx - minx) / cell)) + 3
    ny = int(math.ceil((maxy - miny) / cell)) + 3
    gx = minx - cell + np.arange(nx) * cell
    gy = miny - cell + np.arange(ny) * cell
    X, Y = np.meshgrid(gx, gy)
    X = X + rng.uniform(-0.22, 0.22, X.shape) * cell
    Y = Y + rng.uniform(-0.22, 0.22, Y.shape) * cell
    lines = [LineString(np.column_stack([X[r], Y[r]])) for r in range(ny)]
    lines += [LineString(np.column_stack([X[:, c], Y[:, c]])) for c in range(nx)]
    return lines


def merge_slivers(faces: list[Polygon], owner: list[str], min_area: float):
    """Merge faces smaller than min_area into the same-district neighbour
    with which they share the longest border. Keeps the tiling exact."""
    faces = list(faces)
    owner = list(owner)
    alive = [True] * len(faces)
    merged = 0
    while True:
        small = [i for i in range(len(faces)) if alive[i] and faces[i].area < min_area]
        if not small:
            break
        progressed = False
        for i in sorted(small, key=lambda k: faces[k].area):
            if not alive[i] or faces[i].area >= min_area:
                continue
            best, best_len = None, 0.0
            for j in range(len(faces)):
                if j == i or not alive[j] or owner[j] != owner[i]:
                    continue
                if not faces[i].intersects(faces[j]):
                    continue
                shared = faces[i].boundary.intersection(faces[j].boundary).length
                if shared > best_len:
                    best, best_len = j, shared
            if best is None:
                continue
            faces[best] = single(shapely.unary_union([faces[best], faces[i]]))
            alive[i] = False
            merged += 1
            progressed = True
        if not progressed:
            break
    keep = [i for i in range(len(faces)) if alive[i]]
    return [faces[i] for i in keep], [owner[i] for i in keep], merged


def build_blocks(rng, districts_utm: dict, outline):
    ids = list(districts_utm)
    lines = [g.boundary for g in districts_utm.values()]
    lines += jittered_grid_lines(rng, outline.bounds, BLOCK_CELL_M)
    faces = faces_of(lines)
    tree_geoms = list(districts_utm.values())
    kept, owner = [], []
    for f in faces:
        p = f.representative_point()
        hits = [ids[k] for k, g in enumerate(tree_geoms) if g.contains(p)]
        if len(hits) == 1:
            kept.append(f)
            owner.append(hits[0])
        elif len(hits) > 1:
            raise AssertionError("face inside two districts")
    nominal = BLOCK_CELL_M**2
    kept, owner, merged = merge_slivers(kept, owner, MIN_BLOCK_FRACTION * nominal)
    # sort blocks north-to-south, then west-to-east, by representative point
    keys = []
    for f in kept:
        p = f.representative_point()
        keys.append((-round(p.y / BLOCK_CELL_M), p.x))
    order = sorted(range(len(kept)), key=lambda k: keys[k])
    kept = [kept[k] for k in order]
    owner = [owner[k] for k in order]

    # population: mean density over a 300 m lattice inside the block x area,
    # with multiplicative and Poisson noise
    pops = []
    step = 300.0
    for f in kept:
        minx, miny, maxx, maxy = f.bounds
        xs = np.arange(minx + step / 2, maxx, step)
        ys = np.arange(miny + step / 2, maxy, step)
        X, Y = np.meshgrid(xs, ys)
        inside = shapely.contains_xy(f, X.ravel(), Y.ravel())
        px, py = X.ravel()[inside], Y.ravel()[inside]
        if px.size == 0:
            rp = f.representative_point()
            px, py = np.array([rp.x]), np.array([rp.y])
        lon, lat = _TO_LONLAT.transform(px, py)
        mean_density = float(np.mean(population_density(lon, lat)))
        expected = mean_density * (f.area / 1e6) * rng.lognormal(0.0, 0.25)
        pops.append(int(rng.poisson(expected)))
    return kept, owner, pops, merged


def build_service_zones(rng, outline, lake):
    z = []
    # Z01 a library route buffered along a winding road across the north,
    # leaving the county in the west
    road = LineString([km(-36, 14), km(-24, 12), km(-14, 16), km(-3, 14), km(6, 17), km(14, 15)])
    z.append(("Northern Library Loop", "Vale Mobile Libraries", road.buffer(2200.0, quad_segs=8)))
    # Z02 a town circle around Vossimble, Z03 nested entirely inside it
    mx, my = km(TOWNS[0][1], TOWNS[0][2])
    z02 = Point(mx, my).buffer(6500.0, quad_segs=16)
    z.append(("Vossimble Town Outreach", "Vale County Council", z02))
    old_town = MultiPoint([km(TOWNS[0][1] + dx, TOWNS[0][2] + dy) for dx, dy in rng.normal(0.0, 1.3, size=(9, 2))])
    z03 = old_town.convex_hull.buffer(400.0, quad_segs=4)
    z.append(("Vossimble Old Town Walk", "Vale County Council", z03))
    # Z04 convex hull of scattered hamlets in the south-west, crossing the border
    pts = MultiPoint([km(dx, dy) for dx, dy in zip(rng.uniform(-33, -14, 14), rng.uniform(-22, -9, 14))])
    z.append(("Mossquibble Hamlets Round", "Fen and Downs Outreach Trust", pts.convex_hull))
    # Z05 a ring road circuit around Quorvindle: a polygon with a hole
    ax, ay = km(TOWNS[1][1], TOWNS[1][2])
    ring = LinearRing(wobbly_ring(ax, ay, 3800.0, 3000.0, 10.0, rng, n=40, amp=0.05, jitter=0.0))
    z.append(("Quorvindle Ring Circuit", "Vale Mobile Libraries", ring.buffer(1100.0, quad_segs=6)))
    # Z06 an irregular blob over the eastern valleys
    z.append(("Eastern Valleys Visits", "Tansquillow Community Co-op", wobbly_polygon(*km(18, 2), 9000.0, 6000.0, 30.0, rng, n=60, amp=0.18, jitter=0.03)))
    # Z07 a meandering river corridor crossing the whole county west to east
    xs = np.linspace(-38, 38, 60)
    ys = -7.0 + 3.0 * np.sin(xs / 6.0) + 1.2 * np.sin(xs / 2.3 + 1.0)
    river = LineString([km(x, y) for x, y in zip(xs, ys)])
    z.append(("Snibbet Brook Corridor", "Fen and Downs Outreach Trust", river.buffer(1300.0, quad_segs=6)))
    # Z08 a lakeside route: covers Quonkle Mere (water, outside every district)
    z.append(("Quonkle Mere Shoreline", "Tansquillow Community Co-op", lake.buffer(1800.0, quad_segs=8)))
    # Z09 convex hull of farms in the south hills
    pts = MultiPoint([km(dx, dy) for dx, dy in zip(rng.uniform(-6, 12, 12), rng.uniform(-21, -12, 12))])
    z.append(("Droskelby Farms Round", "Vale County Council", pts.convex_hull))
    # Z10 a cross-border partnership zone, mostly outside the county to the east
    z.append(("Eastern Border Partnership", "Quarnivel Joint Services", wobbly_polygon(*km(32, -4), 7000.0, 10000.0, -15.0, rng, n=48, amp=0.12, jitter=0.02)))
    # Z11 a patrol strip along the edge of Thrumblewood Forest
    fx, fy, fa, fb, frot = FOREST
    edge = LinearRing(wobbly_ring(*km(fx, fy), fa * 1150.0, fb * 1150.0, frot, rng, n=50, amp=0.03, jitter=0.0))
    arc = LineString(list(edge.coords)[5:38])
    z.append(("Thrumblewood Edge Patrol", "Tansquillow Community Co-op", arc.buffer(900.0, quad_segs=6)))
    # Z12 hamlet hopper: a chain of stops, buffered and joined
    stops = [km(6, 4), km(9, -1), km(9, -12), km(2, -18.5)]
    hop = shapely.unary_union([LineString(stops).buffer(700.0)] + [Point(s).buffer(2200.0) for s in stops])
    z.append(("Hamlet Hopper", "Vale Mobile Libraries", hop))

    out = []
    for k, (name, op, g) in enumerate(z, start=1):
        g = single(g)
        assert isinstance(g, Polygon) and g.is_valid, name
        out.append((f"Z{k:02d}", name, op, g))
    assert out[2][3].within(out[1][3]), "Z03 must nest inside Z02"
    assert len(out[4][3].interiors) == 1, "Z05 must have a hole"
    return out


N_CLINICS = 10
TOWN_CLINIC_NAMES = ("Vossimble Health Centre", "Quorvindle Surgery", "Splendock Cross Clinic")
RURAL_CLINIC_KINDS = ("Health Post", "Medical Rooms", "Cottage Clinic", "Family Practice", "Surgery", "Clinic", "Care Point")


def build_clinics(rng, county, districts_utm):
    """Three clinics in the towns, the rest scattered over the countryside
    (not in the forest, at least 7 km apart), named after their district."""
    pts = [km(t[1] + 0.3, t[2] - 0.2) for t in TOWNS]
    names = list(TOWN_CLINIC_NAMES)
    inner = county.buffer(-1000.0)
    district_names = {d[0]: d[1] for d in DISTRICTS}
    tries = 0
    while len(pts) < N_CLINICS:
        tries += 1
        assert tries < 10_000
        x, y = km(rng.uniform(-27, 27), rng.uniform(-19, 19))
        p = Point(x, y)
        if not inner.contains(p) or forest_radius((x - CX) / 1000.0, (y - CY) / 1000.0) < 1.2:
            continue
        if min(math.hypot(x - q[0], y - q[1]) for q in pts) < 7000.0:
            continue
        did = next(d for d, g in districts_utm.items() if g.contains(p))
        kind = RURAL_CLINIC_KINDS[(len(pts) - len(TOWNS)) % len(RURAL_CLINIC_KINDS)]
        names.append(f"{district_names[did]} {kind}")  # kinds differ, so names are unique
        pts.append((x, y))
    reach = np.round(rng.uniform(3000.0, 9000.0, len(pts)), 0)
    assert len(set(names)) == len(names)
    return [(f"C{k:02d}", names[k - 1], float(reach[k - 1]), Point(p)) for k, p in enumerate(pts, start=1)]


def build_reserves(rng, county, lake):
    inner = county.buffer(-400.0)
    fx, fy, fa, fb, frot = FOREST
    specs = [
        ("R01", "Thrumblewood Forest Reserve", km(fx, fy), fa * 850.0, fb * 850.0, frot, True),
        ("R02", "Plodwhistle Fen Marshes", km(19.0, -3.0), 2400.0, 1600.0, 60.0, False),
        ("R03", "Tansquillow Heath Commons", km(-12.0, 16.0), 2600.0, 1700.0, -10.0, False),
        ("R04", "Brumbletoe Hills Meadows", km(21.0, 11.0), 2000.0, 1500.0, 40.0, False),
        ("R05", "Droskelby Chalk Downs", km(-4.5, -16.5), 2800.0, 1300.0, 15.0, False),
    ]
    out = []
    for rid, name, (x, y), a, b, rot, holed in specs:
        g = wobbly_polygon(x, y, a, b, rot, rng, n=56, amp=0.12, jitter=0.015)
        if holed:  # a privately owned clearing excluded from the reserve
            hole = wobbly_polygon(x + 900.0, y - 300.0, 900.0, 600.0, rot + 30.0, rng, n=24, amp=0.06, jitter=0.01)
            g = g.difference(hole)
        g = single(g.intersection(inner).difference(lake.buffer(150.0)))
        assert isinstance(g, Polygon) and g.is_valid, name
        out.append((rid, name, round_utm(g)))
    for i in range(len(out)):
        for j in range(i + 1, len(out)):
            assert not out[i][2].intersects(out[j][2]), "reserves overlap"
    assert len(out[0][2].interiors) == 1
    return out


# ---------------------------------------------------------------------------
# writing
# ---------------------------------------------------------------------------


def clean_outputs():
    names = [GPKG_MAIN, GPKG_RESERVES, GEOJSON, TIF_POP]
    names += [n + s for n in (GPKG_MAIN, GPKG_RESERVES) for s in ("-wal", "-shm", "-journal")]
    names += [SHP_BASE + ext for ext in SHP_SIDECARS]
    names += [TIF_POP + ".aux.xml"]
    for n in names:
        p = OUT_DIR / n
        if p.exists():
            p.unlink()


def write_layer(path, layer, driver, crs, schema, records, **opts):
    kw = dict(driver=driver, crs=crs, schema=schema, **opts)
    if layer is not None:
        kw["layer"] = layer
    with fiona.open(path, "w", **kw) as dst:
        for props, geom in records:
            dst.write({"geometry": mapping(geom), "properties": props})


def write_raster(path, county_ll, lake_water_ll, rng):
    minlon, minlat, maxlon, maxlat = county_ll.bounds
    res = RASTER_RES_DEG
    w_i = math.floor(minlon / res) - RASTER_MARGIN_CELLS
    e_i = math.ceil(maxlon / res) + RASTER_MARGIN_CELLS
    s_i = math.floor(minlat / res) - RASTER_MARGIN_CELLS
    n_i = math.ceil(maxlat / res) + RASTER_MARGIN_CELLS
    width, height = e_i - w_i, n_i - s_i
    west, north = w_i * res, n_i * res
    # 4 x 4 sub-samples per cell for the mean density
    sub = (np.arange(4) + 0.5) / 4.0
    col = np.arange(width)
    row = np.arange(height)
    lon = west + (col[None, :, None, None] + sub[None, None, None, :]) * res
    lat = north - (row[:, None, None, None] + sub[None, None, :, None]) * res
    lon, lat = np.broadcast_arrays(lon, lat)
    dens = population_density(lon, lat).mean(axis=(2, 3))
    lat_c = north - (row + 0.5) * res
    # cell area in km^2 on a sphere of radius 6371.0088 km
    r_km = 6371.0088
    cell_km2 = (np.radians(res) * r_km) ** 2 * np.cos(np.radians(lat_c))
    counts = dens * cell_km2[:, None] * rng.lognormal(0.0, 0.1, size=dens.shape)
    lonc = west + (col + 0.5) * res
    LON, LAT = np.meshgrid(lonc, lat_c)
    water = shapely.contains_xy(lake_water_ll, LON, LAT)
    counts = counts.astype(np.float32)
    counts[water] = RASTER_NODATA
    profile = dict(
        driver="GTiff",
        width=width,
        height=height,
        count=1,
        dtype="float32",
        crs=CRS_LONLAT,
        transform=from_origin(west, north, res, res),
        nodata=RASTER_NODATA,
        compress="deflate",
        predictor=3,
    )
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(counts, 1)
        dst.update_tags(
            1,
            units="persons per cell",
            description="invented Vale County population counts",
        )
    return counts, int(water.sum())


def main():
    rng = np.random.default_rng(SEED)
    clean_outputs()

    outline, lake, island = build_county(rng)
    districts_utm, county_utm, _ = build_districts(rng, outline, lake, island)
    blocks_utm, block_owner, block_pop, merged = build_blocks(rng, districts_utm, outline)
    zones_utm = build_service_zones(rng, outline, lake)
    clinics_utm = build_clinics(rng, county_utm, districts_utm)
    reserves = build_reserves(rng, county_utm, lake)

    # --- lon/lat versions. Districts are rebuilt as the union of their
    # rounded blocks so that blocks and districts share vertices exactly.
    blocks_ll = [to_lonlat(b) for b in blocks_utm]
    districts_ll = {}
    for did in districts_utm:
        parts = [b for b, o in zip(blocks_ll, block_owner) if o == did]
        merged_ll = orient(single(shapely.unary_union(parts)))
        assert merged_ll.is_valid, did
        districts_ll[did] = merged_ll
    names = {d[0]: d[1] for d in DISTRICTS}
    zones_ll = [(zid, name, op, to_lonlat(g)) for zid, name, op, g in zones_utm]
    clinics_ll = [(cid, name, reach, to_lonlat(p)) for cid, name, reach, p in clinics_utm]
    lake_water_ll = to_lonlat(lake).difference(to_lonlat(island))
    county_ll = shapely.unary_union(list(districts_ll.values()))

    any_geom = "Unknown"  # districts mix Polygon and MultiPolygon
    district_schema = {"geometry": any_geom, "properties": {"district_id": "str:3", "name": "str:40"}}
    district_records = [({"district_id": d, "name": names[d]}, g) for d, g in districts_ll.items()]
    gpkg = OUT_DIR / GPKG_MAIN
    write_layer(gpkg, "districts", "GPKG", CRS_LONLAT, district_schema, district_records)
    print(f"{GPKG_MAIN}:districts      {len(district_records)} features")

    zone_schema = {"geometry": "Polygon", "properties": {"zone_id": "str:3", "name": "str:60", "operator": "str:60"}}
    write_layer(
        gpkg,
        "service_zones",
        "GPKG",
        CRS_LONLAT,
        zone_schema,
        [({"zone_id": z, "name": n, "operator": o}, g) for z, n, o, g in zones_ll],
    )
    print(f"{GPKG_MAIN}:service_zones  {len(zones_ll)} features")

    clinic_schema = {"geometry": "Point", "properties": {"clinic_id": "str:3", "name": "str:60", "reach_m": "float"}}
    write_layer(
        gpkg,
        "clinics",
        "GPKG",
        CRS_LONLAT,
        clinic_schema,
        [({"clinic_id": c, "name": n, "reach_m": r}, g) for c, n, r, g in clinics_ll],
    )
    print(f"{GPKG_MAIN}:clinics        {len(clinics_ll)} features")

    block_schema = {
        "geometry": "Polygon",
        "properties": {"block_id": "str:5", "district_id": "str:3", "population": "int"},
    }
    block_records = [
        ({"block_id": f"B{k:04d}", "district_id": o, "population": p}, g)
        for k, (g, o, p) in enumerate(zip(blocks_ll, block_owner, block_pop), start=1)
    ]
    write_layer(gpkg, "blocks", "GPKG", CRS_LONLAT, block_schema, block_records)
    print(
        f"{GPKG_MAIN}:blocks         {len(block_records)} features, "
        f"population {sum(block_pop)}, {sum(p == 0 for p in block_pop)} empty, {merged} slivers merged"
    )

    # Shapefile: DBF field names are limited to 10 characters, so the
    # district_id field is written as "district_i" (what GDAL would truncate to).
    shp_schema = {"geometry": "Polygon", "properties": {"district_i": "str:3", "name": "str:40"}}
    write_layer(
        OUT_DIR / (SHP_BASE + ".shp"),
        None,
        "ESRI Shapefile",
        CRS_LONLAT,
        shp_schema,
        [({"district_i": d, "name": names[d]}, g) for d, g in districts_ll.items()],
        encoding="utf-8",
    )
    print(f"{SHP_BASE}.shp         {len(districts_ll)} features")

    write_layer(
        OUT_DIR / GEOJSON,
        None,
        "GeoJSON",
        CRS_LONLAT,
        district_schema,
        district_records,
        RFC7946="YES",
        COORDINATE_PRECISION=LONLAT_DECIMALS,
    )
    print(f"{GEOJSON}     {len(district_records)} features")

    reserve_schema = {"geometry": "Polygon", "properties": {"reserve_id": "str:3", "name": "str:60"}}
    write_layer(
        OUT_DIR / GPKG_RESERVES,
        "reserves",
        "GPKG",
        CRS_UTM,
        reserve_schema,
        [({"reserve_id": r, "name": n}, g) for r, n, g in reserves],
    )
    print(f"{GPKG_RESERVES}:reserves  {len(reserves)} features, {sum(g.area for _, _, g in reserves) / 1e6:.2f} km2")

    counts, n_water = write_raster(OUT_DIR / TIF_POP, county_ll, lake_water_ll, rng)
    valid = counts[counts != RASTER_NODATA]
    print(
        f"{TIF_POP}        {counts.shape[1]} x {counts.shape[0]} cells, "
        f"population {valid.sum():.0f}, {n_water} nodata cells"
    )

    verify()


# ---------------------------------------------------------------------------
# verification: reopen every file and check it
# ---------------------------------------------------------------------------


def _read(path, layer=None):
    kw = {} if layer is None else {"layer": layer}
    with fiona.open(path, **kw) as src:
        crs = src.crs.to_epsg()
        feats = [(dict(f["properties"]), shapely.geometry.shape(f["geometry"])) for f in src]
    return crs, feats


def verify():
    gpkg = OUT_DIR / GPKG_MAIN
    assert sorted(fiona.listlayers(gpkg)) == ["blocks", "clinics", "districts", "service_zones"]
    crs, districts = _read(gpkg, "districts")
    assert crs == 4326 and len(districts) == 8
    geoms = [g for _, g in districts]
    assert all(shapely.is_valid(geoms))
    area_sum = sum(g.area for g in geoms)
    union = shapely.unary_union(geoms)
    overlap = max(
        geoms[i].intersection(geoms[j]).area for i in range(8) for j in range(i + 1, 8)
    )
    assert overlap < 1e-12 and abs(union.area - area_sum) < 1e-12 * 8
    # county = mainland with one hole (Quonkle Mere) + the island inside that hole
    county_parts = sorted(polygon_parts(union), key=lambda g: -g.area)
    assert len(county_parts) == 2 and len(county_parts[0].interiors) == 1, "county must have one hole"
    assert Polygon(county_parts[0].interiors[0]).contains(county_parts[1])
    kinds = [g.geom_type for g in geoms]
    assert kinds.count("MultiPolygon") == 1
    assert sum(len(g.interiors) > 0 for g in geoms if isinstance(g, Polygon)) == 1
    solidity = min(g.area / g.convex_hull.area for g in geoms)
    assert solidity < 0.7, solidity

    crs, zones = _read(gpkg, "service_zones")
    assert crs == 4326 and len(zones) == 12 and all(g.is_valid for _, g in zones)
    crossing = sum(not g.within(union) and g.intersects(union) for _, g in zones)
    assert crossing >= 2

    crs, clinics = _read(gpkg, "clinics")
    assert crs == 4326 and len(clinics) == 10
    assert all(union.contains(g) and 3000 <= p["reach_m"] <= 9000 for p, g in clinics)

    crs, blocks = _read(gpkg, "blocks")
    assert crs == 4326 and 300 <= len(blocks) <= 600
    assert all(g.is_valid for _, g in blocks)
    by_d = {}
    for p, g in blocks:
        by_d.setdefault(p["district_id"], []).append(g)
        assert p["population"] >= 0
    for (dp, dg) in districts:
        bu = shapely.unary_union(by_d[dp["district_id"]])
        assert dg.symmetric_difference(bu).area < 1e-12
    block_geoms = [g for _, g in blocks]
    assert abs(sum(g.area for g in block_geoms) - area_sum) < 1e-12 * len(blocks)
    assert len({p["block_id"] for p, _ in blocks}) == len(blocks)
    total_pop = sum(p["population"] for p, _ in blocks)
    assert sum(p["population"] == 0 for p, _ in blocks) >= 3
    # every lon/lat coordinate is on the 1e-7 degree grid
    for layer_geoms in (geoms, block_geoms, [g for _, g in zones], [g for _, g in clinics]):
        c = shapely.get_coordinates(layer_geoms)
        assert np.array_equal(c, np.round(c, LONLAT_DECIMALS))

    crs, shp = _read(OUT_DIR / (SHP_BASE + ".shp"))
    assert crs == 4326 and len(shp) == 8
    for (sp, sg), (dp, dg) in zip(shp, districts):
        assert sp["district_i"] == dp["district_id"] and sg.is_valid
        assert sg.symmetric_difference(dg).area < 1e-12
    for ext in (".shx", ".dbf", ".prj", ".cpg"):
        assert (OUT_DIR / (SHP_BASE + ext)).exists(), ext

    crs, gj = _read(OUT_DIR / GEOJSON)
    assert crs == 4326 and len(gj) == 8
    for (gp, gg), (dp, dg) in zip(gj, districts):
        assert gp == dp and gg.is_valid and gg.symmetric_difference(dg).area < 1e-12

    crs, res = _read(OUT_DIR / GPKG_RESERVES, "reserves")
    assert fiona.listlayers(OUT_DIR / GPKG_RESERVES) == ["reserves"]
    assert crs == 32632 and len(res) == 5 and all(g.is_valid for _, g in res)
    county_utm = shapely.transform(union, lambda c: np.column_stack(_TO_UTM.transform(c[:, 0], c[:, 1])))
    assert all(county_utm.contains(g) for _, g in res)

    with rasterio.open(OUT_DIR / TIF_POP) as src:
        assert src.crs.to_epsg() == 4326 and src.nodata == RASTER_NODATA
        assert src.dtypes[0] == "float32" and src.compression.name.lower() == "deflate"
        assert abs(src.res[0] - RASTER_RES_DEG) < 1e-12 and abs(src.res[1] - RASTER_RES_DEG) < 1e-12
        b = src.bounds
        cb = union.bounds
        assert b.left < cb[0] and b.bottom < cb[1] and b.right > cb[2] and b.top > cb[3]
        arr = src.read(1)
        n_nodata = int((arr == RASTER_NODATA).sum())
        assert 1 <= n_nodata <= 30

    size = sum(p.stat().st_size for p in OUT_DIR.iterdir() if p.is_file())
    assert size < 2_000_000, size
    print(
        f"verified: districts tile the county (max pairwise overlap {overlap:.1e} deg2, "
        f"min solidity {solidity:.2f}), blocks population {total_pop}, "
        f"{n_nodata} raster nodata cells, sample_data/ total {size / 1024:.0f} KiB"
    )


if __name__ == "__main__":
    main()
