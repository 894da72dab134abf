"""Samplers: where random points go, behind one interface and one factory.

A *domain* says where points may fall and how uniforms become plane points:
a :class:`Box` maps ``[0, 1)²`` onto an axis-aligned box of the equal-area
plane; an importance proposal (:class:`areamc.density.Proposal`) maps
``[0, 1)³`` onto points distributed like a density.  A *sampler* is built
from a seed and a domain, in the shape of ``scipy.stats.qmc`` engines, and
its ``random(n)`` returns the next `n` points as plane coordinates (metres).

Every job gets its sampler from :func:`make_sampler`, by name or by class;
:func:`register_sampler` adds a new kind without touching any job.

The uniform sampler cuts each stream into blocks of :data:`BLOCK` points,
block ``k`` drawn from its own ``SeedSequence`` child (spawn key
``(..., k)``), so the points depend only on the seed and their position in
the stream, never on how many are asked for at a time.  This is what makes
results independent of the chunk size.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Protocol, runtime_checkable

import numpy as np

from .errors import OptionError
from .seeds import child_seed

__all__ = [
    "BLOCK",
    "Box",
    "Domain",
    "Sampler",
    "UniformSampler",
    "scale_to_box",
    "make_sampler",
    "register_sampler",
    "SAMPLERS",
    "SamplerFactory",
    "sampler_name",
    "ReplicateSampler",
    "SobolSampler",
    "SOBOL_MIN_POINTS",
    "check_sampler",
    "draws_replicates",
    "require_box",
    "is_replicate",
    "interval_method",
    "INTERVALS",
]

#: Points per independent random block of the uniform sampler.
BLOCK = 1 << 16


@dataclass(frozen=True)
class Box:
    """An axis-aligned box (xmin, ymin, xmax, ymax) in plane metres; a sampling domain of 2 uniforms."""

    xmin: float
    ymin: float
    xmax: float
    ymax: float

    #: Uniforms per point.
    dims = 2

    @classmethod
    def of(cls, bounds) -> "Box":
        """The box of ``(xmin, ymin, xmax, ymax)`` bounds (shapely's ``bounds``), plane metres."""
        xmin, ymin, xmax, ymax = (float(v) for v in bounds)
        return cls(xmin, ymin, xmax, ymax)

    @property
    def area(self) -> float:
        """Box area in m²."""
        return (self.xmax - self.xmin) * (self.ymax - self.ymin)

    def intersection(self, other: "Box") -> "Box | None":
        """The overlap of two boxes, or None when they do not meet in a region of positive area."""
        b = Box(max(self.xmin, other.xmin), max(self.ymin, other.ymin),
                min(self.xmax, other.xmax), min(self.ymax, other.ymax))
        return b if b.xmax > b.xmin and b.ymax > b.ymin else None

    def map(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Map ``(n, 2)`` uniforms in [0, 1)² into the box; see :func:`scale_to_box`."""
        return scale_to_box(u, self)


def scale_to_box(u: np.ndarray, box: Box) -> tuple[np.ndarray, np.ndarray]:
    """Map points of [0, 1)² to `box` (plane metres); returns ``(x, y)`` arrays.

    Raises ValueError for a box with no area or non-finite corners.
    """
    if not (np.isfinite([box.xmin, box.ymin, box.xmax, box.ymax]).all() and box.area > 0):
        raise ValueError(f"cannot sample a degenerate box {box}")
    x = box.xmin + u[:, 0] * (box.xmax - box.xmin)
    y = box.ymin + u[:, 1] * (box.ymax - box.ymin)
    return x, y


@runtime_checkable
class Domain(Protocol):
    """Where a sampler's points fall: `dims` uniforms per point, mapped to plane metres by `map`.

    `area` is what a hit fraction is scaled by: m² for a box, the total
    count (persons) for an importance proposal.
    """

    dims: int

    @property
    def area(self) -> float:
        ...

    def map(self, u: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Map ``(n, dims)`` uniforms in [0, 1) to ``(x, y)`` in plane metres."""
        ...


@runtime_checkable
class Sampler(Protocol):
    """A stream of points in a domain, built as ``Sampler(seed, domain)``.

    ``random(n)`` returns the next `n` points as ``(x, y)`` in plane metres;
    the points depend only on the seed and their position in the stream, so
    drawing in chunks of any size gives the same points.
    """

    name: str
    domain: Domain

    def random(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        ...

    def reset(self) -> None:
        ...

    def fast_forward(self, n: int) -> None:
        ...

    @property
    def generated(self) -> int:
        ...


class _BlockStream:
    """Uniforms in [0, 1)² from PCG64, in blocks of :data:`BLOCK` rows, block ``k`` from ``child_seed(seed, k)``.

    Rows are drawn from a block only as they are asked for: a block's
    generator yields its rows in order, so the first ``m`` rows of a block
    are the same whether ``m`` or :data:`BLOCK` rows are drawn.
    """

    def __init__(self, seed: np.random.SeedSequence) -> None:
        self._seed = seed
        self._block = -1
        self._rows = 0  # rows drawn so far from the current block's generator
        self._rng: np.random.Generator | None = None

    def take(self, position: int, n: int, out: np.ndarray) -> None:
        """Fill ``out`` (``(n, 2)``) with the rows at stream positions ``position ..``."""
        filled = 0
        while filled < n:
            k, offset = divmod(position + filled, BLOCK)
            if k != self._block or offset != self._rows:
                bits = np.random.PCG64(child_seed(self._seed, k))
                bits.advance(2 * offset)  # one 64-bit draw per double, two doubles per row
                self._rng, self._block, self._rows = np.random.Generator(bits), k, offset
            take = min(n - filled, BLOCK - offset)
            out[filled : filled + take] = self._rng.random((take, 2))
            self._rows += take
            filled += take


class _Positioned:
    """The stream-position part of the sampler protocol: a sampler's points depend only on their position."""

    _position: int = 0

    def reset(self) -> None:
        """Go back to the start of the stream."""
        self._position = 0

    def fast_forward(self, n: int) -> None:
        """Skip the next `n` points."""
        self._position += int(n)

    @property
    def generated(self) -> int:
        """Position in the stream: points handed out (or skipped) since the last reset."""
        return self._position


def require_box(domain: Domain, sampler: str) -> Box:
    """`domain` if it is a :class:`Box`; otherwise refuse (parameter ``sampler``): only plain samplers take densities."""
    if not isinstance(domain, Box):
        raise OptionError(f"{{param}}: the {sampler} sampler samples boxes; this job samples a density, "
                          "which it takes with the uniform sampler", param="sampler")
    return domain


class UniformSampler(_Positioned):
    """Independent uniform points in a domain.

    Parameters
    ----------
    seed : numpy.random.SeedSequence
        The stream's root.  For a domain of 2 uniforms, block ``k`` uses
        ``child_seed(seed, k)``; for more, uniforms ``2j`` and ``2j + 1`` come
        from the stream ``child_seed(seed, j)``, so each pair of dimensions
        is an independent stream.
    domain : Domain
        A :class:`Box` or an importance proposal.

    Examples
    --------
    >>> from areamc.seeds import make_seed
    >>> s = UniformSampler(make_seed(7), Box(0.0, 0.0, 10.0, 5.0))
    >>> x, y = s.random(5); s.reset(); x2, _ = s.random(2); x3, _ = s.random(3)
    >>> bool((x == np.concatenate([x2, x3])).all()), s.generated
    (True, 5)
    """

    name = "uniform"

    def __init__(self, seed: np.random.SeedSequence, domain: Domain) -> None:
        self.domain = domain
        dims = int(domain.dims)
        if dims <= 2:
            self._streams = [_BlockStream(seed)]
        else:
            self._streams = [_BlockStream(child_seed(seed, j)) for j in range((dims + 1) // 2)]
        self._dims = dims
        self._position = 0

    def unit(self, n: int) -> np.ndarray:
        """The next `n` points as uniforms in [0, 1), shape ``(n, dims)``."""
        out = np.empty((n, 2 * len(self._streams)))
        for j, stream in enumerate(self._streams):
            block = np.empty((n, 2))
            stream.take(self._position, n, block)
            out[:, 2 * j : 2 * j + 2] = block
        self._position += n
        return out[:, : self._dims]

    def random(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """The next `n` points as ``(x, y)`` in plane metres."""
        return self.domain.map(self.unit(n))


@runtime_checkable
class ReplicateSampler(Sampler, Protocol):
    """A sampler whose points come in independent *replicates* of `replicate_size` stream positions.

    The engine draws whole replicates and asks the sampler to turn each
    replicate's scores into an unbiased estimate (:meth:`totals`, in the
    domain's unit: m² for a box, plus :attr:`known`, the part of the answer
    known exactly).  The estimate is the mean of the replicate estimates and
    its interval comes from their spread (Student's t); how points are
    spread within a replicate (scrambled nets, strata) is the sampler's
    business.  :meth:`next_stage` is called between the pilot and the final
    batch of a precision target, and may change `replicate_size` (for
    example to reallocate points among strata).
    """

    replicate_size: int
    known: float
    #: Upper bound of a replicate estimate beyond :attr:`known` (the sampled part's measure), m².
    span: float

    def totals(self, scores: np.ndarray) -> np.ndarray:
        """Per replicate estimates ``(n // replicate_size, m)`` from scores ``(n, m)`` in stream order."""
        ...

    def next_stage(self) -> None:
        ...


def is_replicate(sampler) -> bool:
    """True for a :class:`ReplicateSampler` (its runs get a replicate-based interval)."""
    return hasattr(sampler, "replicate_size") and hasattr(sampler, "totals")


#: Points per scrambling of the Sobol sampler at least (a power of two).
SOBOL_MIN_POINTS = 1 << 4
#: Points per scrambling under a precision target: the final batch adds scramblings of this size.
SOBOL_TARGET_POINTS = 1 << 12
#: Points per scrambling at most (2^20).
SOBOL_MAX_POINTS = 1 << 20
#: Scramblings a fixed-count Sobol run aims for: enough for a t interval with 15 degrees of freedom.
SOBOL_REPLICATES = 16


class SobolSampler(_Positioned):
    """Randomised quasi-Monte Carlo: independent scramblings of a Sobol sequence in a :class:`Box`.

    Replicate ``j`` is the first ``m`` points (a power of two, so a whole
    net) of a two-dimensional Sobol sequence scrambled as
    ``scipy.stats.qmc.Sobol(d=2, scramble=True)`` does (a random linear
    matrix scramble with a digital shift, Matoušek 1998), seeded from
    ``child_seed(seed, j)``.  Each replicate's estimate is unbiased and
    replicates are independent, so their spread gives a Student-t interval
    (the replicate approach of L'Ecuyer, Munger & Tuffin 2010, "On the
    distribution of integration error by randomly-shifted lattice rules",
    Electron. J. Statist. 4:950-993).

    The published rate compared with (docs/methods.md has the measurement):
    for scrambled nets the variance is o(1/m) for every square-integrable
    integrand (Owen 1997, "Monte Carlo variance of scrambled net
    quadrature", SIAM J. Numer. Anal. 34:1884-1910), and for the indicator
    of a set with a boundary of finite length in the unit square it is
    O(m^(-3/2)), an error of O(m^(-3/4)) against plain sampling's m^(-1/2)
    (He & Wang 2015, SIAM J. Numer. Anal. 53:2488-2503; quoted from memory).

    The replicate size `m` is set by :meth:`plan`: for a fixed number of
    points, the largest power of two in ``[2^4, 2^20]`` that leaves
    :data:`SOBOL_REPLICATES` replicates; for a precision target,
    :data:`SOBOL_TARGET_POINTS`, the final batch then adding replicates.

    Parameters
    ----------
    seed : numpy.random.SeedSequence
    domain : Box
        Plane metres.
    """

    name = "sobol"
    replicate = True

    def __init__(self, seed: np.random.SeedSequence, domain: Domain) -> None:
        self.domain = require_box(domain, "Sobol")
        self._seed = seed
        self._position = 0
        self.replicate_size = SOBOL_MIN_POINTS
        self.known = 0.0
        self.span = domain.area

    def plan(self, points: int | None) -> None:
        """Choose the replicate size for a fixed run of `points` points (None: a precision target, 2^12)."""
        if points is None:
            self.replicate_size = SOBOL_TARGET_POINTS
            return
        m = SOBOL_MIN_POINTS
        while m * 2 * SOBOL_REPLICATES <= points and m * 2 <= SOBOL_MAX_POINTS:
            m *= 2
        self.replicate_size = m

    def unit(self, n: int) -> np.ndarray:
        """The next `n` points (whole replicates) as uniforms in [0, 1)², shape ``(n, 2)``."""
        from scipy.stats import qmc

        m = self.replicate_size
        if n % m or self._position % m:
            raise ValueError(f"a Sobol sampler draws whole replicates of {m} points")
        out = np.empty((n, 2))
        first = self._position // m
        for j in range(n // m):
            engine = qmc.Sobol(d=2, scramble=True, seed=np.random.Generator(np.random.PCG64(
                child_seed(self._seed, first + j))))
            out[j * m : (j + 1) * m] = engine.random_base2(m.bit_length() - 1)
        self._position += n
        return out

    def random(self, n: int) -> tuple[np.ndarray, np.ndarray]:
        """The next `n` points (whole replicates) as ``(x, y)`` in plane metres."""
        return self.domain.map(self.unit(n))

    def totals(self, scores: np.ndarray) -> np.ndarray:
        """Each replicate's estimate: box area x its mean score (summed left to right)."""
        m = self.replicate_size
        rows = scores.reshape(-1, m, scores.shape[1]).astype(np.float64)
        return np.cumsum(rows, axis=1)[:, -1, :] * (self.domain.area / m)

    def next_stage(self) -> None:
        """Nothing changes between stages: the final batch is more scramblings of the same size."""


SamplerFactory = Callable[[np.random.SeedSequence, Domain], Sampler]

def _stratified(seed: np.random.SeedSequence, domain: Domain) -> Sampler:
    """The stratified sampler of :mod:`areamc.strata` (imported here lazily: it builds on cell grids)."""
    from .strata import StratifiedSampler

    return StratifiedSampler(seed, domain)


_stratified.name = "stratified"
_stratified.replicate = True

#: Samplers by name.
SAMPLERS: dict[str, SamplerFactory] = {"uniform": UniformSampler, "sobol": SobolSampler, "stratified": _stratified}


def draws_replicates(kind: str | SamplerFactory) -> bool:
    """True when a sampler kind draws replicates (``sobol``, ``stratified``): its factory's ``replicate`` mark."""
    factory = SAMPLERS.get(kind) if isinstance(kind, str) else kind
    return bool(getattr(factory, "replicate", False))


def check_sampler(kind: str | SamplerFactory, job: str) -> None:
    """Refuse a replicate sampler (``sobol``, ``stratified``) for a job that needs per-point counts (parameter ``sampler``).

    Overlaps, the multiplicity profile and weighted totals are formed from
    hit counts or per-point scores; the area and coverage jobs turn
    replicate sums into estimates.
    """
    if draws_replicates(kind):
        raise OptionError(f"{{param}}: the {job} job takes a sampler of single points such as 'uniform'; "
                          f"{sampler_name(kind)!r} draws replicates, which only the area and coverage jobs use "
                          "so far", param="sampler")


def register_sampler(name: str, factory: SamplerFactory) -> None:
    """Make `factory` (a class built as ``factory(seed, domain)``) available to every job as `name`."""
    SAMPLERS[name] = factory


def make_sampler(kind: str | SamplerFactory, seed: np.random.SeedSequence, domain: Domain) -> Sampler:
    """Build the sampler every job uses: `kind` is a registered name or a factory.

    Raises
    ------
    OptionError
        For an unknown name (parameter ``sampler``).
    """
    if callable(kind):
        return kind(seed, domain)
    try:
        factory = SAMPLERS[kind]
    except (KeyError, TypeError):
        raise OptionError(
            f"{{param}}: unknown sampler {kind!r}; choose one of {', '.join(SAMPLERS)}", param="sampler"
        ) from None
    return factory(seed, domain)


#: How each built-in sampler's intervals are formed, for headers and reports.
INTERVALS = {
    "uniform": "Wilson intervals",
    "sobol": "Student-t intervals over independent Sobol scramblings",
    "stratified": "Student-t intervals over rounds of strata (cells wholly inside counted exactly)",
}


def interval_method(kind: str | SamplerFactory) -> str:
    """A short phrase naming how a sampler kind's intervals are formed (hit-or-miss jobs)."""
    return INTERVALS.get(sampler_name(kind), "intervals")


def sampler_name(kind: str | SamplerFactory) -> str:
    """The name a sampler kind is recorded under in results."""
    if isinstance(kind, str):
        return kind
    return str(getattr(kind, "name", getattr(kind, "__name__", "custom")))
