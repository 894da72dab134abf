"""Seeds and independent random streams.

Every stream areamc draws from is a ``numpy.random.SeedSequence`` child of
the run's root, keyed by position: first by job (so ``area`` and
``coverage`` on one seed get independent points), then by feature, pair or
region, then by block.  Streams are never made by adding numbers to a seed,
which can make them overlap (numpy's "Parallel random number generation"
guide).
"""

from __future__ import annotations

import numpy as np

from .errors import OptionError

__all__ = ["JOB_KEYS", "make_seed", "child_seed", "job_root"]

#: First spawn-key element of each job's streams.
JOB_KEYS = {"area": 1, "overlap": 2, "coverage": 3, "integrate": 4}


def make_seed(seed: int | np.random.SeedSequence | None = None) -> np.random.SeedSequence:
    """Normalise a seed into a ``SeedSequence`` (fresh OS entropy when None).

    Parameters
    ----------
    seed : int, SeedSequence or None
        A non-negative whole number, an existing sequence (returned as it
        is), or None for fresh entropy.

    Returns
    -------
    numpy.random.SeedSequence
        Its ``entropy`` is what output metadata records, so a run without a
        seed can be replayed by passing that entropy as the seed.

    Raises
    ------
    OptionError
        For a negative or non-integral seed (parameter ``seed``).
    """
    if isinstance(seed, np.random.SeedSequence):
        return seed
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise OptionError(f"{{param}}: must be a non-negative whole number, got {seed!r}", param="seed")
    return np.random.SeedSequence(seed)


def child_seed(root: np.random.SeedSequence, *key: int) -> np.random.SeedSequence:
    """Return the child of `root` at spawn position `key` (as ``SeedSequence.spawn`` would).

    Children are keyed by position (job, feature index, block index, ...),
    never by adding numbers to the seed, so streams do not overlap.
    """
    return np.random.SeedSequence(root.entropy, spawn_key=tuple(root.spawn_key) + tuple(int(k) for k in key))


def job_root(root: np.random.SeedSequence, job: str) -> np.random.SeedSequence:
    """The root of one job's streams: the child of `root` keyed by :data:`JOB_KEYS`."""
    return child_seed(root, JOB_KEYS[job])
