"""The fair exact baselines: the best exact method we could write with shapely for each benchmark job.

Every benchmark in this folder times areamc against one of these functions in
the same run (docs/performance.md).  They use only shapely, numpy, pyproj,
fiona and rasterio, never areamc, so the baseline is what a skilled analyst
would write without areamc: spatial-index queries (``shapely.STRtree``),
unions of only the geometries that meet, vectorised predicates and overlays,
shortcuts for pieces wholly inside, and no Python loop per feature where one
vectorised call does.  Each function says which alternatives were measured
against it, with their times on this 2-core machine (one core used, best of 3
unless stated; timings vary by about ±15% while other work runs), and why it
is the one kept.  ``population_overlay.py --alternatives`` and
``multiplicity.py --alternatives`` re-run those comparisons.

All geometries are in one equal-area plane (metres); areas in m².
"""

from __future__ import annotations

from contextlib import closing

import fiona
import numpy as np
import pyproj
import shapely
from shapely.geometry import shape

__all__ = [
    "load_plane",
    "polygon_area",
    "contains_points",
    "zone_counts",
    "population_covered",
    "covered_population_loop",
    "covered_population_dissolved",
    "covered_population_by",
    "covered_share",
    "covered_shares",
    "at_least_k_share",
    "at_least_2_share_pairs_union",
    "raster_cell_fractions",
    "raster_total",
]


# -- loading -------------------------------------------------------------------------------------------------

def load_plane(path, layer: str, plane_crs, fields: tuple[str, ...] = ()) -> tuple[np.ndarray, dict]:
    """Read a polygon layer and put it on `plane_crs` (metres) with one pyproj call for all its coordinates.

    The baseline's loader.  A GeoPackage is an SQLite database (OGC
    GeoPackage 1.3, §2.1.3: each geometry a blob of an 8-byte header, an
    optional envelope, then ISO WKB), so it is read with one ``sqlite3``
    query and one vectorised ``shapely.from_wkb``; other formats through
    fiona records and ``shapely.geometry.shape``.  Then one
    ``shapely.transform`` whose function gets every coordinate of the layer
    at once (``always_xy``).  Returns the geometries in the plane and
    ``{field: float array}`` for the requested attribute `fields`.  No checks
    or repairs: the benchmark scenes are valid by construction.

    Measured on the population scene's 10,407 blocks: sqlite and WKB 0.02 s,
    fiona records and ``shape`` 1.7 s; the transform 0.09 s.
    """
    if str(path).lower().endswith(".gpkg"):
        geoms, values, crs = _read_gpkg(path, layer, fields)
    else:
        with fiona.open(path, layer=layer) as src:
            crs = pyproj.CRS.from_wkt(src.crs_wkt)
            records = list(src)
        geoms = np.array([shape(rec.geometry) for rec in records], dtype=object)
        values = {f: np.array([float(rec.properties[f]) for rec in records]) for f in fields}
    if not pyproj.CRS(plane_crs).equals(crs):
        trans = pyproj.Transformer.from_crs(crs, plane_crs, always_xy=True)
        geoms = shapely.transform(geoms, lambda xy: np.column_stack(trans.transform(xy[:, 0], xy[:, 1])))
    return geoms, values


#: Bytes of the envelope after a GeoPackage geometry header, by the envelope code in bits 1-3 of the flags.
_GPKG_ENVELOPE = {0: 0, 1: 32, 2: 48, 3: 48, 4: 64}


def _read_gpkg(path, layer: str, fields: tuple[str, ...]):
    """Geometries, attribute arrays and CRS of one GeoPackage feature table, by SQL."""
    import sqlite3

    with closing(sqlite3.connect(f"file:{path}?mode=ro", uri=True)) as con:
        column, srs = con.execute("SELECT column_name, srs_id FROM gpkg_geometry_columns WHERE table_name = ?",
                                  (layer,)).fetchone()
        (definition,) = con.execute("SELECT definition FROM gpkg_spatial_ref_sys WHERE srs_id = ?", (srs,)).fetchone()
        names = ", ".join(f'"{n}"' for n in (column, *fields))
        rows = con.execute(f'SELECT {names} FROM "{layer}"').fetchall()
    blobs = [row[0] for row in rows]
    wkb = [memoryview(b)[8 + _GPKG_ENVELOPE[(b[3] >> 1) & 7]:] for b in blobs]
    geoms = shapely.from_wkb(np.array([bytes(w) for w in wkb], dtype=object))
    values = {f: np.array([float(row[i + 1]) for row in rows]) for i, f in enumerate(fields)}
    return geoms, values, pyproj.CRS.from_wkt(definition)


# -- one polygon -------------------------------------------------------------------------------------------

def polygon_area(geoms) -> np.ndarray:
    """Exact planar area (m²) of each geometry given in an equal-area plane: ``shapely.area``, one vectorised call."""
    return np.asarray(shapely.area(geoms), dtype=float)


def contains_points(geom, x, y) -> np.ndarray:
    """Exact point-in-polygon test of plane points: shapely's ``contains_xy`` on the prepared polygon.

    The standard fast exact test (no Point objects, one vectorised call,
    GEOS's prepared-geometry index of the edges).
    """
    shapely.prepare(geom)
    return shapely.contains_xy(geom, x, y)


def zone_counts(zones, x, y, region=None) -> np.ndarray:
    """Number of `zones` containing each plane point (0 for points outside `region`, when given).

    One ``STRtree`` of the zones queried with all the points at once for the
    box candidates, then, zone by zone, one prepared ``contains_xy`` over its
    candidate points.  Measured on 157,184 points (those of 262,144 in the
    district) against 10,000 disks of 257 vertices (1.5 times cover), best
    of 2: this 0.50-0.73 s; an STRtree of the points queried by the zones,
    then the same loop, 0.67 s; box candidates then one ``contains_xy`` over
    the pair arrays (zone geometry per pair) 1.57 s; the tree query with
    ``predicate="within"`` 3.5 s.  All give the same counts.
    """
    x = np.asarray(x, float)
    y = np.asarray(y, float)
    counts = np.zeros(len(x), dtype=np.int64)
    keep = np.arange(len(x))
    if region is not None:
        shapely.prepare(region)
        keep = np.flatnonzero(shapely.contains_xy(region, x, y))
    zones = np.asarray(zones, dtype=object)
    if not len(zones) or not len(keep):
        return counts
    shapely.prepare(zones)
    xk, yk = x[keep], y[keep]
    point, zone = shapely.STRtree(zones).query(shapely.points(xk, yk))
    order = np.argsort(zone, kind="stable")
    point, zone = point[order], zone[order]
    cut = np.flatnonzero(np.diff(zone)) + 1
    hit = np.empty(len(point), dtype=bool)
    for lo, hi in zip(np.concatenate([[0], cut]), np.concatenate([cut, [len(point)]])):
        pts = point[lo:hi]
        hit[lo:hi] = shapely.contains_xy(zones[zone[lo]], xk[pts], yk[pts])
    counts[keep] = np.bincount(point[hit], minlength=len(keep))
    return counts


# -- covered population (areal weighting) --------------------------------------------------------------------

def _group_union_area(owner: np.ndarray, pieces: np.ndarray, n: int) -> np.ndarray:
    """Area of the union of `pieces` grouped by `owner` (0..n-1): one ``union_all`` over a padded 2-D array (axis 1)."""
    out = np.zeros(n)
    if not len(owner):
        return out
    order = np.argsort(owner, kind="stable")
    owner, pieces = owner[order], pieces[order]
    count = np.bincount(owner, minlength=n)
    rows = np.flatnonzero(count)
    position = np.arange(len(owner)) - np.repeat(np.cumsum(count[rows]) - count[rows], count[rows])
    grid = np.full((len(rows), int(count.max())), None, dtype=object)
    grid[np.searchsorted(rows, owner), position] = pieces
    out[rows] = shapely.area(shapely.union_all(grid, axis=1))
    return out


def _clip_to(geoms: np.ndarray, region) -> np.ndarray:
    """`geoms` intersected with `region`, skipping the overlay for those wholly inside it."""
    if region is None:
        return geoms
    shapely.prepare(region)
    inside = shapely.contains_properly(region, geoms)
    out = geoms.copy()
    out[~inside] = shapely.intersection(geoms[~inside], region)
    return out


def population_covered(blocks, counts, zones, region=None) -> float:
    """Population covered by at least one zone, by areal weighting (Goodchild & Lam 1980, Geo-Processing 1:297-312).

    Σ count_i x |block_i ∩ region ∩ ∪ zones| / |block_i|, blocks and zones
    in plane metres, counts in persons; `region` (optional) restricts the
    blocks first (blocks wholly inside it are used as they are).

    The method, all vectorised: one ``STRtree`` query gives every (block,
    zone) pair that meets; a block inside one of its zones (``covers``, zones
    prepared) is wholly covered and needs no overlay; every other pair is
    intersected in one ``shapely.intersection`` call; a block met by one zone
    takes that piece's area, and a block met by several takes the area of the
    union of its pieces (one ``union_all`` over a padded array, axis 1), so
    only the zones touching a block are ever unioned.

    Measured on the population_overlay.py scene (10,407 blocks, 1,000 zones of
    257 vertices; best of 3, one core): this function 0.56-0.58 s; the same
    local unions as a Python loop over blocks (union of the zones meeting
    each block, then intersection; :func:`covered_population_loop`) 1.6 s;
    a dissolve first (``union_all`` of all zones once, then an ``STRtree`` of
    the union's parts queried by the blocks and one vectorised intersection,
    :func:`covered_population_dissolved`) 7.8 s, because the union's parts are
    large and every block crossing one is overlaid with all of it.  The naive
    overlay (``union_all`` of the zones, then intersection of every block
    with the whole union) took 44-69 s (issue 9).  All four give 464,505.28.
    """
    blocks = np.asarray(blocks, dtype=object)
    full_area = shapely.area(blocks)
    covered = _covered_block_area(_clip_to(blocks, region), np.asarray(zones, dtype=object))
    with np.errstate(divide="ignore", invalid="ignore"):
        share = np.where(full_area > 0, covered / full_area, 0.0)
    return float(np.sum(np.asarray(counts, float) * share))


def _covered_block_area(blocks: np.ndarray, zones: np.ndarray) -> np.ndarray:
    """|block ∩ ∪ zones| (m²) for every block, by the local method of :func:`population_covered`."""
    n = len(blocks)
    covered = np.zeros(n)
    if not n or not len(zones):
        return covered
    shapely.prepare(zones)
    b, z = shapely.STRtree(zones).query(blocks, predicate="intersects")
    whole = shapely.covers(zones[z], blocks[b])
    full = np.zeros(n, dtype=bool)
    full[b[whole]] = True
    covered[full] = shapely.area(blocks[full])
    keep = ~full[b]
    b, z = b[keep], z[keep]
    pieces = shapely.intersection(blocks[b], zones[z])
    single = np.bincount(b, minlength=n)[b] == 1
    covered[b[single]] = shapely.area(pieces[single])
    covered += _group_union_area(b[~single], pieces[~single], n)
    return covered


def covered_population_loop(blocks, counts, zones) -> float:
    """The same areal weighting with local unions written as a Python loop over blocks (an alternative, slower).

    Per block: ``union_all`` of the zones its STRtree query returns, then
    the block's intersection with that local union.
    """
    blocks = np.asarray(blocks, dtype=object)
    zones = np.asarray(zones, dtype=object)
    b, z = shapely.STRtree(zones).query(blocks, predicate="intersects")
    order = np.argsort(b, kind="stable")
    b, z = b[order], z[order]
    cut = np.flatnonzero(np.diff(b)) + 1
    areas = shapely.area(blocks)
    total = 0.0
    for lo, hi in zip(np.concatenate([[0], cut]), np.concatenate([cut, [len(b)]])):
        i = b[lo]
        local = shapely.union_all(zones[z[lo:hi]])
        total += counts[i] * shapely.area(shapely.intersection(blocks[i], local)) / areas[i]
    return float(total)


def covered_population_dissolved(blocks, counts, zones) -> float:
    """Areal weighting after one dissolve of all zones (an alternative, slower on overlapping zones).

    ``union_all`` of the zones once, an ``STRtree`` of the union's parts,
    one vectorised intersection of every (block, part) pair that meets.
    """
    blocks = np.asarray(blocks, dtype=object)
    parts = shapely.get_parts(shapely.union_all(np.asarray(zones, dtype=object)))
    b, p = shapely.STRtree(parts).query(blocks, predicate="intersects")
    inter = shapely.area(shapely.intersection(blocks[b], parts[p]))
    covered = np.bincount(b, weights=inter, minlength=len(blocks))
    return float(np.sum(np.asarray(counts, float) * covered / shapely.area(blocks)))


def covered_population_by(blocks, counts, zones, owner, districts) -> np.ndarray:
    """Covered population of each district, every block lying in one district (`owner`, an index into `districts`).

    Per district, :func:`population_covered` (areal weighting) of its blocks
    against only the zones meeting the district (one query of a shared
    ``STRtree`` of all the zones):
    Σ_{i in d} count_i x |block_i ∩ ∪ zones| / |block_i| (persons; plane metres).

    Measured on moonshot.py's scene at scale 0.1 (300 districts, 101,777
    blocks, 10,000 zones; best of 2, one core): this 7.7-8.6 s; the zones
    found by querying the district's blocks instead of its outline 11.0 s;
    the local unions run once over all the blocks and summed per district
    11.3-13.8 s (its padded union array spans every block); per district, a
    dissolve of the zones meeting it (:func:`covered_population_dissolved`)
    9.2 s.  All agree to 1e-15.
    """
    blocks = np.asarray(blocks, dtype=object)
    zones = np.asarray(zones, dtype=object)
    districts = np.asarray(districts, dtype=object)
    counts = np.asarray(counts, float)
    owner = np.asarray(owner)
    tree = shapely.STRtree(zones)
    order = np.argsort(owner, kind="stable")
    cuts = np.searchsorted(owner[order], np.arange(len(districts) + 1))
    out = np.zeros(len(districts))
    for d in np.flatnonzero(np.diff(cuts)):
        mine = order[cuts[d]:cuts[d + 1]]
        near = zones[tree.query(districts[d], predicate="intersects")]
        out[d] = population_covered(blocks[mine], counts[mine], near) if len(near) else 0.0
    return out


# -- coverage multiplicity -----------------------------------------------------------------------------------

def covered_share(district, zones) -> float:
    """Exact share of `district` covered by at least one zone: |district ∩ ∪ zones| / |district| (plane metres).

    Local union: only the zones an ``STRtree`` query finds meeting the
    district are unioned; zones wholly inside it skip the clip.
    """
    zones = np.asarray(zones, dtype=object)
    near = zones[shapely.STRtree(zones).query(district, predicate="intersects")]
    if not len(near):
        return 0.0
    return float(shapely.area(shapely.union_all(_clip_to(near, district)))) / district.area


def covered_shares(districts, zones) -> np.ndarray:
    """Exact share of each of many districts covered by at least one zone (plane metres), with one tree for all.

    Per district: the union of only the zones an ``STRtree`` query (one tree
    of all the zones) finds meeting it, then its intersection with the
    district: |district ∩ ∪ near zones| / |district|.

    Measured on moonshot.py's scene at scale 0.1 (300 districts, 10,000
    zones of 97 vertices; best of 2, one core): this 1.35-1.43 s; the same
    vectorised (one query for all pairs, unions over a padded array, one
    intersection call) 1.53 s; clipping each zone to the district first and
    unioning the pieces (:func:`covered_share`'s order, zones inside kept
    whole) 1.80 s vectorised, 1.98 s in a loop; a dissolve of all zones then
    the district's intersection with the parts 3.6 s.  All agree to 5e-15.
    (:func:`covered_share` itself, in a loop, would build the tree of all
    the zones once per district.)
    """
    districts = np.asarray(districts, dtype=object)
    zones = np.asarray(zones, dtype=object)
    tree = shapely.STRtree(zones)
    out = np.zeros(len(districts))
    for i, district in enumerate(districts):
        near = zones[tree.query(district, predicate="intersects")]
        if len(near):
            out[i] = shapely.area(shapely.intersection(district, shapely.union_all(near))) / district.area
    return out


def at_least_k_share(district, zones, k: int) -> float:
    """Exact share of `district` covered by at least `k` zones, from the planar arrangement (plane metres).

    The zones meeting the district (``STRtree`` query) and the district's
    boundary are noded in one call (``shapely.node`` of all their boundary
    lines), polygonized into the faces of the arrangement; each face lies in
    a fixed set of zones, counted by one ``STRtree`` query of a point on
    every face (``predicate="within"``); faces outside the district are
    dropped by a prepared ``contains``.  k = 1 uses :func:`covered_share`.

    Measured on the multiplicity.py scene (5,000 disks of 257 vertices, 1.5
    times cover, k = 2; one run each, one core): this arrangement 1.7-1.9 s
    (noding 0.5 s, polygonize 0.9 s, counting 0.3 s); noding by
    ``union_all`` of the lines instead of ``shapely.node`` 1.9 s; the union of
    pairwise intersections from STRtree pairs (:func:`at_least_2_share_pairs_union`:
    9,262 lenses in one vectorised ``intersection``, then ``union_all``) 4.4 s;
    the same in 16 x 16 to 64 x 64 tiles 3.2-4.9 s; the union of all zones
    less each zone's part covered by no other (per-zone local unions) 3.0 s;
    the arrangement in 2 x 2 to 8 x 8 tiles 1.8-2.8 s.  All agree to 1e-14.
    """
    if k <= 1:
        return covered_share(district, zones)
    zones = np.asarray(zones, dtype=object)
    near = zones[shapely.STRtree(zones).query(district, predicate="intersects")]
    if len(near) < k:
        return 0.0
    lines = shapely.multilinestrings(
        shapely.get_parts(np.concatenate([shapely.boundary(near), [shapely.boundary(district)]])))
    faces = shapely.get_parts(shapely.polygonize(shapely.get_parts(shapely.node(lines))))
    probes = shapely.point_on_surface(faces)
    shapely.prepare(district)
    keep = shapely.contains(district, probes)
    faces, probes = faces[keep], probes[keep]
    face_idx, _ = shapely.STRtree(near).query(probes, predicate="within")
    depth = np.bincount(face_idx, minlength=len(faces))
    return float(shapely.area(faces[depth >= k]).sum()) / district.area


def at_least_2_share_pairs_union(district, zones) -> float:
    """Share of `district` covered by at least 2 zones as the union of pairwise intersections (an alternative, slower).

    STRtree self-query for the pairs that meet, one vectorised
    ``shapely.intersection`` over the pair arrays, ``union_all`` of the
    lenses, clipped to the district.
    """
    zones = np.asarray(zones, dtype=object)
    near = zones[shapely.STRtree(zones).query(district, predicate="intersects")]
    a, b = shapely.STRtree(near).query(near, predicate="intersects")
    keep = a < b
    lenses = shapely.intersection(near[a[keep]], near[b[keep]])
    lenses = lenses[~shapely.is_empty(lenses)]
    return float(shapely.area(shapely.union_all(_clip_to(lenses, district)))) / district.area


# -- raster cell fractions -----------------------------------------------------------------------------------

def _boundary_cells(region, transform, rows: int, cols: int) -> np.ndarray:
    """Flat indices (row * cols + col) of every cell an edge of `region` passes through (a supercover).

    Each edge contributes the cells holding its end points and, for every
    grid line it crosses, the cells on both sides of the crossing.  Within
    1e-7 of a cell, both neighbours are taken, so rounding can only add
    cells, never lose one (an extra cell is merely clipped exactly).
    """
    a, c, e, f = transform.a, transform.c, transform.e, transform.f
    coords, which = shapely.get_coordinates(shapely.get_parts(shapely.boundary(region)), return_index=True)
    u = (coords[:, 0] - c) / a  # fractional column
    v = (coords[:, 1] - f) / e  # fractional row (downward)
    same = which[1:] == which[:-1]
    u0, u1, v0, v1 = u[:-1][same], u[1:][same], v[:-1][same], v[1:][same]
    eps = 1e-7
    cells_r, cells_c = [], []

    def add(r, cc):
        cells_r.append(r)
        cells_c.append(cc)

    for du in (-eps, eps):  # end points
        for dv in (-eps, eps):
            add(np.floor(v0 + dv), np.floor(u0 + du))
    for lo_, hi_, p0, p1, q0, q1, vertical in ((u0, u1, u0, u1, v0, v1, True), (v0, v1, v0, v1, u0, u1, False)):
        lo = np.floor(np.minimum(lo_, hi_)) + 1
        hi = np.floor(np.maximum(lo_, hi_))
        n = np.maximum(hi - lo + 1, 0).astype(np.int64)
        edge = np.repeat(np.arange(len(n)), n)
        line = lo[edge] + (np.arange(int(n.sum())) - np.repeat(np.cumsum(n) - n, n))
        t = (line - p0[edge]) / (p1[edge] - p0[edge])
        q = q0[edge] + t * (q1[edge] - q0[edge])
        for d in (-eps, eps):
            for side in (line - 1, line):
                if vertical:
                    add(np.floor(q + d), side)
                else:
                    add(side, np.floor(q + d))
    r = np.concatenate(cells_r).astype(np.int64)
    cc = np.concatenate(cells_c).astype(np.int64)
    ok = (r >= 0) & (r < rows) & (cc >= 0) & (cc < cols)
    return np.unique(r[ok] * cols + cc[ok])


def raster_cell_fractions(region, transform, shape_rc: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Share of each cell of a north-up grid inside `region`: ``(flat cell indices, fractions)`` for cells with any.

    `region` is in the raster's own CRS, which must be an equal-area plane in
    metres (so every cell has the same area, |a x e|); `transform` is the
    raster's affine transform (rasterio ``Affine``, no rotation).  Exact and
    vectorised, with no polygon for an interior cell:

    1. the cells the region's edges pass through are found from the edges'
       crossings with the grid lines (:func:`_boundary_cells`);
    2. every other cell in the region's window lies wholly inside or wholly
       outside, decided by one ``contains_xy`` of its centre (prepared region);
    3. only the crossing cells become boxes, intersected with the region in
       one call, after the region is cut into tiles of 32 x 32 cells so each
       cell is overlaid with a small piece of it, not the whole outline.
    """
    rows, cols = shape_rc
    if transform.b or transform.d:
        raise ValueError("raster_cell_fractions: rotated rasters are not handled")
    a, c, e, f = transform.a, transform.c, transform.e, transform.f
    xmin, ymin, xmax, ymax = region.bounds
    c0 = max(int(np.floor((xmin - c) / a)), 0)
    c1 = min(int(np.ceil((xmax - c) / a)), cols)
    r0 = max(int(np.floor((ymax - f) / e)), 0)
    r1 = min(int(np.ceil((ymin - f) / e)), rows)
    if c1 <= c0 or r1 <= r0:
        return np.zeros(0, dtype=np.int64), np.zeros(0)
    edge = _boundary_cells(region, transform, rows, cols)
    rr, cc = np.meshgrid(np.arange(r0, r1), np.arange(c0, c1), indexing="ij")
    flat = (rr * cols + cc).ravel()
    interior = flat[~np.isin(flat, edge)]
    shapely.prepare(region)
    centre_x = c + a * (interior % cols + 0.5)
    centre_y = f + e * (interior // cols + 0.5)
    inside = interior[shapely.contains_xy(region, centre_x, centre_y)]
    # crossing cells: clip with the region's piece in their 32 x 32 tile
    er, ec = edge // cols, edge % cols
    tile = (er // 32) * ((cols + 31) // 32) + ec // 32
    tiles, tile_of = np.unique(tile, return_inverse=True)
    tr, tc = (tiles // ((cols + 31) // 32)) * 32, (tiles % ((cols + 31) // 32)) * 32
    tile_boxes = shapely.box(c + a * tc, f + e * np.minimum(tr + 32, rows), c + a * np.minimum(tc + 32, cols), f + e * tr)
    pieces = shapely.intersection(tile_boxes, region)
    cell_boxes = shapely.box(c + a * ec, f + e * (er + 1), c + a * (ec + 1), f + e * er)
    share = shapely.area(shapely.intersection(cell_boxes, pieces[tile_of])) / abs(a * e)
    keep = share > 0
    cells = np.concatenate([inside, edge[keep]])
    fractions = np.concatenate([np.ones(len(inside)), share[keep]])
    return cells, fractions


def raster_total(region, counts: np.ndarray, transform) -> float:
    """Exact total of a count raster over `region`: Σ count x share of the cell inside (:func:`raster_cell_fractions`).

    `counts` is the band as a (rows, cols) array of counts per cell (persons),
    `region` in the raster's equal-area CRS (metres).
    """
    cells, fractions = raster_cell_fractions(region, transform, counts.shape)
    return float(np.sum(counts.ravel()[cells] * fractions))
