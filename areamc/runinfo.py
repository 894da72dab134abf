"""What produced a set of results: one record shared by every job's report."""

from __future__ import annotations

import platform
from dataclasses import dataclass, field
from functools import lru_cache

from .project import EqualAreaPlane
from .stopping import StopRule

__all__ = ["RunInfo", "versions"]

#: What an absolute tolerance is measured in, per job (areas stay in m² in metadata, whatever the output unit).
_TOLERANCE_UNIT = {"area": "m2", "overlap": "m2", "coverage": "share", "integrate": "count"}


@lru_cache(maxsize=1)
def versions() -> dict[str, str]:
    """Versions of areamc, Python and the libraries whose results it relies on (GEOS, PROJ and GDAL too)."""
    import fiona
    import numpy
    import pyproj
    import scipy
    import shapely

    from . import __version__

    return {
        "areamc": __version__,
        "python": platform.python_version(),
        "numpy": numpy.__version__,
        "scipy": scipy.__version__,
        "shapely": shapely.__version__,
        "geos": shapely.geos_version_string,
        "pyproj": pyproj.__version__,
        "proj": pyproj.proj_version_str,
        "fiona": fiona.__version__,
        "gdal": fiona.__gdal_version__,
    }


@dataclass(frozen=True)
class RunInfo:
    """The settings behind a report.

    Attributes
    ----------
    job : str
        "area", "overlap", "coverage" or "integrate".
    plane : EqualAreaPlane
        The plane areas were computed in (metres).
    confidence : float
    seed_entropy : int
        Root seed entropy; passing it as the seed replays the run.
    sampler : str
        Name of the sampler kind.
    stop : StopRule
    densify_m : float
        Longest edge (metres) before reprojection.
    versions : dict
        From :func:`versions`.
    """

    job: str
    plane: EqualAreaPlane
    confidence: float
    seed_entropy: int
    sampler: str
    stop: StopRule
    densify_m: float
    versions: dict = field(default_factory=versions)

    def to_dict(self) -> dict:
        """Metadata for result files; the seed is also given as a string, which JSON readers do not round."""
        return {
            "job": self.job,
            "plane": self.plane.to_dict(),
            "confidence": self.confidence,
            "seed": self.seed_entropy,
            "seed_text": str(self.seed_entropy),
            "sampler": self.sampler,
            "stop": {**self.stop.to_dict(), "tolerance_absolute_unit": _TOLERANCE_UNIT.get(self.job)},
            "densify_m": self.densify_m,
            "streams": f"keyed by job ({self.job}), then by feature, pair or region, then by block",
            "versions": dict(self.versions),
        }
