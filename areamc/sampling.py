"""Random points: seeds, samplers and mapping to a box.

Samplers produce points in the half-open unit square [0, 1)²; mapping them to
a bounding box is :func:`scale_to_box`.  A sampler's stream is cut into fixed
blocks of :data:`BLOCK` points, block ``k`` drawn from its own
``SeedSequence`` child (spawn key ``(..., k)``), so the points a sampler
yields depend only on the seed and their position in the stream, never on
how many are requested at a time.  This is what makes results independent of
the chunk size and, later, of the number of workers.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .errors import OptionError

__all__ = ["BLOCK", "make_seed", "child_seed", "UniformSampler", "scale_to_box", "Box"]

#: Points per independent random block.
BLOCK = 1 << 16


def make_seed(seed: int | np.random.SeedSequence | None = None) -> np.random.SeedSequence:
    """Normalise a user seed into a ``SeedSequence`` (fresh OS entropy when None).

    The returned sequence's ``entropy`` is what output metadata records, so a
    run without ``--seed`` can be replayed with ``--seed <entropy>``.
    """
    if isinstance(seed, np.random.SeedSequence):
        return seed
    if seed is not None and (not isinstance(seed, (int, np.integer)) or seed < 0):
        raise OptionError(f"--seed: must be a non-negative whole number, got {seed!r}")
    return np.random.SeedSequence(seed)


def child_seed(root: np.random.SeedSequence, *key: int) -> np.random.SeedSequence:
    """Return the child of `root` at spawn position `key` (as ``SeedSequence.spawn`` would).

    Children are keyed by position (feature index, block index, ...), never by
    adding numbers to the seed, so streams do not overlap (numpy's
    "Parallel random number generation" guide).
    """
    return np.random.SeedSequence(root.entropy, spawn_key=tuple(root.spawn_key) + tuple(int(k) for k in key))


class UniformSampler:
    """Independent uniform points in [0, 1)² from PCG64, in seed-keyed blocks.

    Parameters
    ----------
    seed : numpy.random.SeedSequence
        The stream's root; block ``k`` uses ``child_seed(seed, k)``.

    Examples
    --------
    >>> s = UniformSampler(make_seed(7))
    >>> a = s.random(5); s.reset(); b = np.vstack([s.random(2), s.random(3)])
    >>> bool((a == b).all())
    True
    """

    def __init__(self, seed: np.random.SeedSequence) -> None:
        self._seed = seed
        self.reset()

    def reset(self) -> None:
        """Go back to the start of the stream."""
        self._position = 0
        self._block_index = -1
        self._block: np.ndarray | None = None

    @property
    def generated(self) -> int:
        """Number of points handed out since the last reset."""
        return self._position

    def _load(self, k: int) -> np.ndarray:
        if k != self._block_index:
            rng = np.random.Generator(np.random.PCG64(child_seed(self._seed, k)))
            self._block = rng.random((BLOCK, 2))
            self._block_index = k
        return self._block

    def random(self, n: int) -> np.ndarray:
        """Return the next `n` points as an ``(n, 2)`` float array in [0, 1)²."""
        out = np.empty((n, 2))
        filled = 0
        while filled < n:
            k, offset = divmod(self._position, BLOCK)
            take = min(n - filled, BLOCK - offset)
            out[filled : filled + take] = self._load(k)[offset : offset + take]
            filled += take
            self._position += take
        return out


@dataclass(frozen=True)
class Box:
    """An axis-aligned box (xmin, ymin, xmax, ymax) in plane metres."""

    xmin: float
    ymin: float
    xmax: float
    ymax: float

    @classmethod
    def of(cls, bounds) -> "Box":
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


def scale_to_box(u: np.ndarray, box: Box) -> tuple[np.ndarray, np.ndarray]:
    """Map points of [0, 1)² to `box` (plane metres); returns ``(x, y)`` arrays."""
    if not (np.isfinite([box.xmin, box.ymin, box.xmax, box.ymax]).all() and box.area > 0):
        raise ValueError(f"cannot sample a degenerate box {box}")
    x = box.xmin + u[:, 0] * (box.xmax - box.xmin)
    y = box.ymin + u[:, 1] * (box.ymax - box.ymin)
    return x, y
