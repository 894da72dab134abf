"""Point classification against polygons in the equal-area plane.

Vectorised over coordinate arrays with shapely's ``contains_xy`` on prepared
geometries; no Point objects and no per-point Python loop.  Boundary rule: a
point exactly on an edge counts as outside (``contains``); for continuous
samplers that event has probability zero.
"""

from __future__ import annotations

import numpy as np
import shapely

__all__ = ["inside"]


def inside(geom) -> "callable":
    """Return ``f(x, y) -> bool array`` testing points (plane metres) against `geom`.

    `geom` is prepared once here, so repeated calls are fast.
    """
    shapely.prepare(geom)

    def test(x: np.ndarray, y: np.ndarray) -> np.ndarray:
        return shapely.contains_xy(geom, x, y)

    return test
