"""Pictures of results as PNG bytes: the coverage map, share bars, convergence, estimates against
exact values and the multiplicity histogram.

This module only draws: it receives numbers already in the unit to show (the caller converts
m² with :func:`areamc.units.area_factor`) and geometries in one CRS, either metres of an
equal-area plane (``lonlat=False``, drawn 1:1) or WGS84 longitude/latitude degrees
(``lonlat=True``, drawn with the aspect of the middle latitude).  It uses matplotlib's
object-oriented API with the Agg canvas (``Figure`` and ``FigureCanvasAgg``): no pyplot, no
display, no backend switch.  Every figure has a fixed size in inches at :data:`DPI` dots per
inch, so a picture of size ``(w, h)`` is ``round(w * DPI) x round(h * DPI)`` pixels, and the
PNG carries no ``Software`` text, so the same data give the same bytes.  Text from input
files (ids) is drawn as plain text, never as mathtext (``text.parse_math`` off).

The colours are fixed so that a screenshot can be checked for them: regions are shaded with
matplotlib's single-hue ``Blues`` colormap over shares 0 to 1 (its darkest blue,
:data:`DARKEST_BLUE`, at share 1, shown on the colour bar), zones are outlined in
:data:`ZONE_COLOUR`, and the claim line is :data:`CLAIM_COLOUR`.
"""

from __future__ import annotations

import io
import math
import struct
from contextlib import ExitStack
from dataclasses import dataclass
from typing import Sequence

__all__ = [
    "DPI",
    "MAP_SIZE",
    "BAR_SIZE",
    "CONVERGENCE_SIZE",
    "ESTIMATES_SIZE",
    "HISTOGRAM_SIZE",
    "MAX_BARS",
    "MAX_PANELS",
    "DARKEST_BLUE",
    "ZONE_COLOUR",
    "CLAIM_COLOUR",
    "ShareSeries",
    "Trace",
    "coverage_map",
    "share_bars",
    "convergence",
    "estimates_vs_exact",
    "multiplicity_histogram",
    "png_size",
]

#: Dots per inch of every picture.
DPI = 100
#: Figure sizes in inches (width, height); pixels are these times :data:`DPI`.
MAP_SIZE = (8.0, 6.5)
BAR_SIZE = (9.0, 4.5)
CONVERGENCE_SIZE = (9.0, 6.0)
ESTIMATES_SIZE = (8.0, 5.0)
HISTOGRAM_SIZE = (7.0, 4.0)
#: At most this many regions are drawn as bars, and this many features get a convergence
#: panel; the caption says how many were left out.
MAX_BARS = 60
MAX_PANELS = 12
#: Feature ids longer than this are shortened (with "...") in labels on pictures.
LABEL_CHARS = 14

#: The colormap of shares, and the colour it gives share 1 (matplotlib's ``Blues`` at 1.0, as
#: matplotlib 3.x defines it; checked by tests/test_report.py against the colormap itself).
SHARE_COLORMAP = "Blues"
DARKEST_BLUE = (0x08, 0x30, 0x6B)
#: Zone outlines on the map: an orange that no Blues shade comes near.
ZONE_COLOUR = (0xE0, 0x7B, 0x00)
#: The claim line on the bars, and nothing else.
CLAIM_COLOUR = (0xD6, 0x1F, 0x2C)
#: Bars of the area share and of the population share, estimates' lines, exact values.
AREA_BAR = (0x4A, 0x86, 0xC0)
POPULATION_BAR = (0x9C, 0xB8, 0x5A)
ESTIMATE_COLOUR = (0x2B, 0x5C, 0x8A)
BAND_COLOUR = (0xB7, 0xCF, 0xE6)
EXACT_COLOUR = (0x22, 0x22, 0x22)
NO_SHARE_COLOUR = (0xDD, 0xDD, 0xDD)


def _rgb(colour: tuple[int, int, int]) -> tuple[float, float, float]:
    return tuple(c / 255 for c in colour)


@dataclass(frozen=True)
class ShareSeries:
    """One set of bars: a share (0..1) per region with its interval, e.g. the area share at k = 1.

    `values`, `lows` and `highs` have one entry per region (None where there is none).
    """

    label: str
    values: Sequence[float | None]
    lows: Sequence[float | None]
    highs: Sequence[float | None]
    colour: tuple[int, int, int] = AREA_BAR


@dataclass(frozen=True)
class Trace:
    """One feature's running estimate: `points` drawn so far and, at each, the estimate and its
    interval (in the unit shown), and the exact value (None when there is none)."""

    id: str
    points: Sequence[int]
    estimates: Sequence[float]
    lows: Sequence[float]
    highs: Sequence[float]
    exact: float | None = None


def _label(text) -> str:
    text = str(text)
    return text if len(text) <= LABEL_CHARS else text[:LABEL_CHARS - 3] + "..."


#: Settings of every figure, over matplotlib's default style: ids drawn as plain text (a ``$`` in an
#: id is not mathtext), a fixed hash salt (SVG ids, should a figure ever be saved as SVG).
_RC = {"text.parse_math": False, "svg.hashsalt": "areamc", "font.size": 10, "axes.titlesize": 11}


class _Figure:
    """A matplotlib Figure on an Agg canvas, with matplotlib's default style and plain text,
    rendered to PNG bytes by :meth:`png`."""

    def __init__(self, size: tuple[float, float]):
        self.size = size
        self._contexts = ExitStack()

    def __enter__(self):
        import matplotlib
        import matplotlib.style
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        self._contexts.enter_context(matplotlib.style.context("default"))
        self._contexts.enter_context(matplotlib.rc_context(_RC))
        self.figure = Figure(figsize=self.size, dpi=DPI, layout="constrained")
        FigureCanvasAgg(self.figure)
        return self

    def __exit__(self, *exc):
        self._contexts.close()

    def png(self) -> bytes:
        buf = io.BytesIO()
        self.figure.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
        return buf.getvalue()


def png_size(png: bytes) -> tuple[int, int]:
    """Width and height in pixels of a PNG, from its IHDR chunk (PNG specification, W3C 2003, §11.2.2).

    >>> png_size(b"\\x89PNG\\r\\n\\x1a\\n" + bytes(4) + b"IHDR" + (700).to_bytes(4, "big") + (60).to_bytes(4, "big"))
    (700, 60)
    """
    if png[:8] != b"\x89PNG\r\n\x1a\n" or png[12:16] != b"IHDR":
        raise ValueError("not a PNG")
    return struct.unpack(">II", png[16:24])


# --- the map ------------------------------------------------------------------------------------

def _paths(geometry):
    """matplotlib Paths of a shapely (Multi)Polygon, exterior counter-clockwise and holes clockwise,
    so that the nonzero fill rule leaves the holes empty."""
    import numpy as np
    from matplotlib.path import Path
    from shapely.geometry.polygon import orient

    polygons = getattr(geometry, "geoms", [geometry])
    out = []
    for polygon in polygons:
        if polygon.geom_type != "Polygon" or polygon.is_empty:
            continue
        polygon = orient(polygon, 1.0)
        vertices, codes = [], []
        for ring in (polygon.exterior, *polygon.interiors):
            xy = np.asarray(ring.coords)[:, :2]
            vertices.append(xy)
            codes += [Path.MOVETO] + [Path.LINETO] * (len(xy) - 2) + [Path.CLOSEPOLY]
        out.append(Path(np.concatenate(vertices), codes))
    return out


def _patch(geometry, **style):
    from matplotlib.patches import PathPatch
    from matplotlib.path import Path

    paths = _paths(geometry)
    if not paths:
        return None
    return PathPatch(Path.make_compound_path(*paths), **style)


def coverage_map(regions: Sequence, shares: Sequence[float | None], zones: Sequence = (), *,
                 ids: Sequence[str] = (), lonlat: bool = False, legend: str = "share covered by at least 1 zone",
                 title: str | None = None, size: tuple[float, float] = MAP_SIZE) -> bytes:
    """A map of the regions shaded by covered share (0..1, ``Blues``; grey where None), with the
    zones' outlines drawn over them and each region labelled by its id; PNG bytes.

    `regions` and `zones` are shapely (Multi)Polygons in one CRS: plane metres, or lon/lat degrees
    with `lonlat`.  `shares` has one entry per region.
    """
    from matplotlib import colormaps
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize

    cmap = colormaps[SHARE_COLORMAP]
    norm = Normalize(0.0, 1.0)
    with _Figure(size) as fig:
        ax = fig.figure.add_subplot()
        bounds = []
        for geometry, share in zip(regions, shares):
            ok = share is not None and math.isfinite(share)
            face = cmap(norm(min(max(share, 0.0), 1.0))) if ok else _rgb(NO_SHARE_COLOUR)
            patch = _patch(geometry, facecolor=face, edgecolor="white", linewidth=1.0, zorder=1)
            if patch is not None:
                ax.add_patch(patch)
                bounds.append(geometry.bounds)
        for geometry in zones:
            patch = _patch(geometry, facecolor="none", edgecolor=_rgb(ZONE_COLOUR), linewidth=2.2, zorder=2)
            if patch is not None:
                ax.add_patch(patch)
                bounds.append(geometry.bounds)
        for geometry, rid, share in zip(regions, ids, shares):
            point = geometry.representative_point()
            dark = share is not None and math.isfinite(share) and share > 0.6
            ax.text(point.x, point.y, _label(rid), ha="center", va="center", fontsize=8, zorder=3,
                    color="white" if dark else "black")
        if bounds:
            x0, y0 = min(b[0] for b in bounds), min(b[1] for b in bounds)
            x1, y1 = max(b[2] for b in bounds), max(b[3] for b in bounds)
            pad = 0.03 * max(x1 - x0, y1 - y0, 1e-9)
            ax.set_xlim(x0 - pad, x1 + pad)
            ax.set_ylim(y0 - pad, y1 + pad)
            if lonlat:
                ax.set_aspect(1 / max(math.cos(math.radians((y0 + y1) / 2)), 0.05))
            else:
                ax.set_aspect("equal")
        if lonlat:
            ax.set_xlabel("longitude (degrees)")
            ax.set_ylabel("latitude (degrees)")
        else:
            ax.set_xlabel("east (m, equal-area plane)")
            ax.set_ylabel("north (m, equal-area plane)")
            ax.ticklabel_format(style="plain", useOffset=False)
            ax.tick_params(axis="x", labelrotation=30)
        bar = fig.figure.colorbar(ScalarMappable(norm=norm, cmap=cmap), ax=ax, shrink=0.8)
        bar.set_label(legend)
        if zones:
            from matplotlib.lines import Line2D

            ax.legend([Line2D([], [], color=_rgb(ZONE_COLOUR), linewidth=2.2)], ["zone outline"],
                      loc="lower left", fontsize=8, framealpha=0.9)
        if title:
            ax.set_title(title)
        return fig.png()


# --- bars ---------------------------------------------------------------------------------------

def _whiskers(values, lows, highs):
    """Asymmetric error-bar lengths (below, above) for matplotlib, 0 where a bound is missing."""
    below, above = [], []
    for v, lo, hi in zip(values, lows, highs):
        below.append(max(v - lo, 0.0) if v is not None and lo is not None else 0.0)
        above.append(max(hi - v, 0.0) if v is not None and hi is not None else 0.0)
    return [below, above]


def share_bars(ids: Sequence[str], series: Sequence[ShareSeries], *, claim: float | None = None,
               ylabel: str = "share", title: str | None = None, size: tuple[float, float] = BAR_SIZE) -> bytes:
    """Grouped bars of shares (0..1) per region, one group per id and one bar per series, with
    interval whiskers, and the claim as a horizontal line; PNG bytes.  At most :data:`MAX_BARS`
    regions (the first) are drawn."""
    n = min(len(ids), MAX_BARS)
    with _Figure(size) as fig:
        ax = fig.figure.add_subplot()
        width = 0.8 / max(len(series), 1)
        for j, s in enumerate(series):
            values = [v if v is not None else math.nan for v in s.values[:n]]
            xs = [i - 0.4 + width * (j + 0.5) for i in range(n)]
            ax.bar(xs, [0.0 if math.isnan(v) else v for v in values], width=width * 0.92, color=_rgb(s.colour),
                   label=s.label, zorder=2)
            err = _whiskers([None if math.isnan(v) else v for v in values], s.lows[:n], s.highs[:n])
            ax.errorbar(xs, [0.0 if math.isnan(v) else v for v in values], yerr=err, fmt="none",
                        ecolor="black", elinewidth=1.2, capsize=3, zorder=3)
        if claim is not None:
            ax.axhline(claim, color=_rgb(CLAIM_COLOUR), linewidth=2.5, zorder=4, label=f"claim {claim:g}")
        ax.set_xticks(range(n), [_label(i) for i in ids[:n]], rotation=45 if n > 8 else 0,
                      ha="right" if n > 8 else "center")
        ax.set_xlim(-0.6, n - 0.4)
        ax.set_ylim(0.0, 1.05)
        ax.set_ylabel(ylabel)
        ax.grid(axis="y", color="#dddddd", zorder=0)
        ax.legend(loc="upper left", bbox_to_anchor=(1.0, 1.0), fontsize=8)
        if title:
            ax.set_title(title)
        return fig.png()


# --- convergence and estimates ------------------------------------------------------------------

def convergence(traces: Sequence[Trace], *, unit: str, title: str | None = None,
                size: tuple[float, float] = CONVERGENCE_SIZE) -> bytes:
    """One panel per feature (the first :data:`MAX_PANELS`): the running estimate against the points
    drawn, its interval as a band, and the exact value as a dashed line where there is one; PNG
    bytes.  `unit` labels the y axes (e.g. ``km2``)."""
    shown = list(traces[:MAX_PANELS])
    cols = 1 if len(shown) <= 1 else 2 if len(shown) <= 4 else 3
    rows = max(1, math.ceil(len(shown) / cols))
    with _Figure(size) as fig:
        axes = fig.figure.subplots(rows, cols, squeeze=False)
        for n, ax in enumerate(axes.flat):
            if n >= len(shown):
                ax.set_visible(False)
                continue
            t = shown[n]
            ax.fill_between(t.points, t.lows, t.highs, color=_rgb(BAND_COLOUR), linewidth=0, label="interval")
            ax.plot(t.points, t.estimates, color=_rgb(ESTIMATE_COLOUR), linewidth=1.5, label="estimate")
            if t.exact is not None:
                ax.axhline(t.exact, color=_rgb(EXACT_COLOUR), linestyle="--", linewidth=1.2, label="exact")
            ax.set_title(_label(t.id), fontsize=9)
            ax.tick_params(labelsize=7)
            ax.ticklabel_format(axis="x", style="sci", scilimits=(0, 3))
            if n % cols == 0:
                ax.set_ylabel(unit, fontsize=8)
            if n == 0:
                ax.legend(fontsize=7, loc="best")
        fig.figure.supxlabel("points drawn", fontsize=9)
        if title:
            fig.figure.suptitle(title)
        return fig.png()


def estimates_vs_exact(ids: Sequence[str], estimates: Sequence[float], lows: Sequence[float],
                       highs: Sequence[float], exact: Sequence[float | None], *, unit: str,
                       title: str | None = None, size: tuple[float, float] = ESTIMATES_SIZE) -> bytes:
    """Each feature's estimate with its interval against its exact value; PNG bytes.

    Where every row with a value has an exact value (> 0), the picture shows the relative deviation
    ``(estimate − exact) / exact`` in percent, with the interval likewise, and a line at 0; otherwise the
    estimates themselves in `unit` with the exact values as markers.  At most :data:`MAX_BARS` rows.
    """
    n = min(len(ids), MAX_BARS)
    rows = list(range(n))
    relative = any(exact[i] for i in rows) and all(exact[i] is not None and exact[i] > 0 for i in rows)
    with _Figure(size) as fig:
        ax = fig.figure.add_subplot()
        ys = list(range(n))[::-1]
        if relative:
            def rel(v, i):  # a deviation below 1e-9 % is rounding, shown as none
                d = 100.0 * (v - exact[i]) / exact[i]
                return 0.0 if abs(d) < 1e-9 else d
            xs = [rel(estimates[i], i) for i in rows]
            err = _whiskers(xs, [rel(lows[i], i) for i in rows], [rel(highs[i], i) for i in rows])
            ax.axvline(0.0, color=_rgb(EXACT_COLOUR), linestyle="--", linewidth=1.2, label="exact")
            ax.set_xlabel("estimate − exact, % of exact (whiskers: interval)")
            reach = max([abs(x) + max(b, a) for x, b, a in zip(xs, *err)] or [0.0])
            if reach < 1e-6:  # every estimate equals its exact value: an axis of ±1 % shows that
                ax.set_xlim(-1.0, 1.0)
        else:
            xs = [estimates[i] for i in rows]
            err = _whiskers(xs, lows[:n], highs[:n])
            known = [(exact[i], y) for i, y in zip(rows, ys) if exact[i] is not None]
            if known:
                ax.plot([k for k, _ in known], [y for _, y in known], "D", color=_rgb(EXACT_COLOUR),
                        markersize=5, label="exact", zorder=3)
            ax.set_xlabel(f"estimate, {unit} (whiskers: interval)")
        ax.errorbar(xs, ys, xerr=err, fmt="o", color=_rgb(ESTIMATE_COLOUR), ecolor=_rgb(ESTIMATE_COLOUR),
                    elinewidth=1.5, capsize=3, label="estimate", zorder=2)
        ax.set_yticks(ys, [_label(ids[i]) for i in rows], fontsize=8 if n > 20 else 9)
        ax.set_ylim(-0.7, n - 0.3)
        ax.grid(axis="x", color="#dddddd", zorder=0)
        ax.legend(fontsize=8, loc="best")
        if title:
            ax.set_title(title)
        return fig.png()


# --- multiplicity -------------------------------------------------------------------------------

def multiplicity_histogram(ks: Sequence[int], areas: Sequence[float], lows: Sequence[float | None],
                           highs: Sequence[float | None], exact: Sequence[float | None] = (), *, unit: str,
                           title: str | None = None, size: tuple[float, float] = HISTOGRAM_SIZE) -> bytes:
    """Bars of the area covered by exactly k zones for each k, with interval whiskers and the exact
    areas as markers where known; PNG bytes.  Areas in `unit`."""
    with _Figure(size) as fig:
        ax = fig.figure.add_subplot()
        ax.bar(list(ks), list(areas), width=0.7, color=_rgb(AREA_BAR), label="estimate", zorder=2)
        ax.errorbar(list(ks), list(areas), yerr=_whiskers(areas, lows, highs), fmt="none", ecolor="black",
                    elinewidth=1.2, capsize=4, zorder=3)
        known = [(k, e) for k, e in zip(ks, exact) if e is not None]
        if known:
            ax.plot([k for k, _ in known], [e for _, e in known], "D", color=_rgb(EXACT_COLOUR), markersize=6,
                    label="exact", zorder=4)
        ax.set_xticks(list(ks))
        ax.set_xlabel("k (number of zones covering a point)")
        ax.set_ylabel(f"area covered by exactly k zones, {unit}")
        ax.grid(axis="y", color="#dddddd", zorder=0)
        ax.legend(fontsize=8)
        if title:
            ax.set_title(title)
        return fig.png()
