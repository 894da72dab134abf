"""What produced a set of results: one record shared by every job's report, the versions of
the libraries behind it, the SHA-256 digests of its input files and the clock (ISO 8601, UTC)."""

from __future__ import annotations

import hashlib
import os
import platform
from dataclasses import dataclass, field
from datetime import datetime, timezone
from functools import lru_cache

from .project import EqualAreaPlane
from .stopping import StopRule

__all__ = ["RunInfo", "versions", "file_digests", "sha256_of", "utc_now"]

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
        "rasterio": _installed("rasterio"),
    }


def _installed(name: str) -> str | None:
    """The installed version of distribution `name` (read from its metadata, not imported), or None."""
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version(name)
    except PackageNotFoundError:
        return None


def utc_now() -> str:
    """The current time in ISO 8601, UTC, to the millisecond: ``2026-12-02T10:15:30.125Z``."""
    return datetime.now(timezone.utc).isoformat(timespec="milliseconds").replace("+00:00", "Z")


#: Bytes read at a time when hashing an input file.
_BLOCK = 1 << 20


def sha256_of(path: str) -> str:
    """The SHA-256 digest (FIPS 180-4) of the file at `path`, as 64 hex digits, read in 1 MiB blocks.

    Digests are remembered per real path, size and modification time, so a file read as two
    inputs (regions and zones from one GeoPackage) is hashed once.
    """
    info = os.stat(path)
    return _sha256(os.path.realpath(path), info.st_size, info.st_mtime_ns)


@lru_cache(maxsize=256)
def _sha256(real: str, size: int, mtime_ns: int) -> str:
    digest = hashlib.sha256()
    with open(real, "rb") as handle:
        for block in iter(lambda: handle.read(_BLOCK), b""):
            digest.update(block)
    return digest.hexdigest()


def file_digests(path: str, layer: str | None = None) -> list[dict]:
    """``[{"path": ..., "sha256": ...}]`` for every existing file of the input dataset at `path`.

    A Shapefile gives every part that exists (``.shp``, ``.shx``, ``.dbf``, ``.prj``, ``.cpg``, spatial
    indexes, in either case: :func:`areamc.output.dataset_files`); a folder of Shapefiles the parts
    of its `layer`; a GeoPackage, GeoJSON or raster file the file itself (a GeoPackage's
    ``-wal``/``-shm`` files are SQLite's and not hashed).  Paths are spelt as given.  No CRS or
    units involved.
    """
    from .output import SHAPEFILE_PARTS, dataset_files

    if os.path.isdir(path):
        if not layer:
            return []
        path = os.path.join(path, layer + ".shp")
    if os.path.splitext(path)[1].lower() == ".shp":
        names = [n for n in dataset_files(path) if os.path.splitext(n)[1].lower() in SHAPEFILE_PARTS]
    else:
        names = [path]
    out, seen = [], set()
    for name in names:
        if not os.path.isfile(name):
            continue
        info = os.stat(name)
        if (info.st_dev, info.st_ino) in seen:  # x.shx and x.SHX on a case-insensitive file system
            continue
        seen.add((info.st_dev, info.st_ino))
        out.append({"path": name, "sha256": sha256_of(name)})
    return out


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
        Root seed entropy; passing it as the seed replays the run.  Result files carry it as a
        string of decimal digits (a 128-bit number is beyond the integers JSON readers keep exactly).
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
        """Metadata for result files.  The seed is a string of decimal digits: a fresh seed is a 128-bit
        number, which JSON readers that hold numbers as doubles (jq, JavaScript) would round."""
        return {
            "job": self.job,
            "plane": self.plane.to_dict(),
            "confidence": self.confidence,
            "seed": str(self.seed_entropy),
            "sampler": self.sampler,
            "stop": {**self.stop.to_dict(), "tolerance_absolute_unit": _TOLERANCE_UNIT.get(self.job)},
            "densify_m": self.densify_m,
            "streams": f"keyed by job ({self.job}), then by feature, pair or region, then by block",
            "versions": dict(self.versions),
        }
