"""Tests of ``areamc.samplers``: the uniform sampler, boxes, and the sampler factory.

References:

* numpy's PCG64 ``Generator`` driven directly (``np.random.Generator(np.random.PCG64(seq))``),
  with child sequences from ``SeedSequence.spawn`` (numpy "Parallel random number generation"
  guide): the documented construction is block ``k`` of a stream = the first rows of
  ``Generator(PCG64(child k)).random((BLOCK, 2))``;
* uniformity: the Kolmogorov-Smirnov test (``scipy.stats.kstest``) and Pearson's chi-square on a
  grid (``scipy.stats.chisquare``), fixed seeds, failing below p = 1e-3 (common practice);
* the standard error of a sample correlation under independence, about 1/sqrt(n), with a
  4-SE band (common practice).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

import areamc.samplers as samplers_module
from areamc.errors import OptionError
from areamc.samplers import (
    BLOCK,
    SAMPLERS,
    Box,
    Domain,
    Sampler,
    UniformSampler,
    make_sampler,
    register_sampler,
    sampler_name,
    scale_to_box,
)
from areamc.seeds import child_seed, make_seed

UNIT = Box(0.0, 0.0, 1.0, 1.0)
BOX = Box(-3.0e5, 4.0e6, 2.0e5, 4.25e6)


def numpy_blocks(entropy: int, blocks: int, key: tuple = ()) -> np.ndarray:
    """Whole BLOCK-row blocks of [0, 1)² drawn with numpy directly: block k from the spawned child (*key, k)."""
    out = []
    for k in range(blocks):
        seq = np.random.SeedSequence(entropy, spawn_key=tuple(key) + (k,))
        out.append(np.random.Generator(np.random.PCG64(seq)).random((BLOCK, 2)))
    return np.vstack(out)


def to_box(u: np.ndarray, box: Box) -> tuple[np.ndarray, np.ndarray]:
    """Affine map of [0, 1)² onto the box, written out here (x = xmin + u (xmax − xmin))."""
    return box.xmin + u[:, 0] * (box.xmax - box.xmin), box.ymin + u[:, 1] * (box.ymax - box.ymin)


# --------------------------------------------------------------------------------------------
# The uniform sampler
# --------------------------------------------------------------------------------------------


def test_uniform_sampler__same_points_for_any_request_sizes():
    # Requests that cross block boundaries (BLOCK = 65536) in odd places.
    n = 2 * BLOCK + 12_345
    whole = UniformSampler(make_seed(9), UNIT).unit(n)
    sampler = UniformSampler(make_seed(9), UNIT)
    sizes = [1, BLOCK - 2, 3, 1000, BLOCK, n - (1 + BLOCK - 2 + 3 + 1000 + BLOCK)]
    pieces = [sampler.unit(s) for s in sizes]
    assert sampler.generated == n
    np.testing.assert_array_equal(np.vstack(pieces), whole)


def test_uniform_sampler__lazy_blocks_equal_whole_numpy_blocks():
    # Reference: whole 65 536-row blocks drawn with numpy directly, block k from child_seed(seed, k)
    # (built here as SeedSequence(entropy, spawn_key=(k,)), which test_seeds checks is the same
    # as numpy's spawn), scaled to the box by the affine map written out in to_box.
    entropy = 31337
    reference = numpy_blocks(entropy, 3)
    assert np.random.Generator(np.random.PCG64(child_seed(make_seed(entropy), 1))).random((5, 2)).tolist() \
        == reference[BLOCK : BLOCK + 5].tolist()
    rx, ry = to_box(reference, BOX)
    sampler = UniformSampler(make_seed(entropy), BOX)
    sizes = [7, BLOCK - 10, 5, 2, 40_001, BLOCK - 40_000 + 3, 999, 12_345]  # straddle both boundaries
    xs, ys = [], []
    for s in sizes:
        x, y = sampler.random(s)
        assert x.shape == y.shape == (s,)
        xs.append(x)
        ys.append(y)
    n = sum(sizes)
    assert BLOCK < n < 3 * BLOCK and sampler.generated == n
    np.testing.assert_array_equal(np.concatenate(xs), rx[:n])
    np.testing.assert_array_equal(np.concatenate(ys), ry[:n])
    # unit() hands out the raw uniforms of the same stream
    sampler.reset()
    np.testing.assert_array_equal(sampler.unit(BLOCK + 17), reference[: BLOCK + 17])


@pytest.mark.parametrize("skip", [0, 1, 1000, BLOCK - 1, BLOCK, BLOCK + 777, 2 * BLOCK + 3])
def test_uniform_sampler__fast_forward_equals_drawing_and_discarding(skip):
    drawn = UniformSampler(make_seed(4), BOX)
    drawn.random(skip)  # drawn and discarded
    skipped = UniformSampler(make_seed(4), BOX)
    skipped.fast_forward(skip)
    assert skipped.generated == drawn.generated == skip
    for size in (5, BLOCK):  # the next points, across a boundary too
        a, b = drawn.random(size), skipped.random(size)
        np.testing.assert_array_equal(a[0], b[0])
        np.testing.assert_array_equal(a[1], b[1])
    # ...and against the numpy blocks directly
    reference = numpy_blocks(4, 4)
    rx, _ = to_box(reference, BOX)
    skipped.reset()
    skipped.fast_forward(skip)
    np.testing.assert_array_equal(skipped.random(100)[0], rx[skip : skip + 100])


def test_uniform_sampler__fast_forward_after_drawing():
    # Skipping in the middle of a stream: draw 10, skip BLOCK, draw 10 = rows [0, 10) and [10 + BLOCK, 20 + BLOCK).
    reference = numpy_blocks(12, 2)
    sampler = UniformSampler(make_seed(12), UNIT)
    first = sampler.unit(10)
    sampler.fast_forward(BLOCK)
    second = sampler.unit(10)
    np.testing.assert_array_equal(first, reference[:10])
    np.testing.assert_array_equal(second, reference[10 + BLOCK : 20 + BLOCK])
    assert sampler.generated == 20 + BLOCK


def test_uniform_sampler__reset_replays():
    sampler = UniformSampler(make_seed(9), UNIT)
    first = sampler.unit(BLOCK + 10)
    sampler.reset()
    assert sampler.generated == 0
    np.testing.assert_array_equal(sampler.unit(BLOCK + 10), first)


def test_uniform_sampler__zero_points():
    sampler = UniformSampler(make_seed(1), UNIT)
    x, y = sampler.random(0)
    assert x.shape == y.shape == (0,)
    assert sampler.unit(0).shape == (0, 2)
    assert sampler.generated == 0


def test_uniform_sampler__children_differ():
    root = make_seed(123)
    a = UniformSampler(child_seed(root, 0), UNIT).unit(1000)
    b = UniformSampler(child_seed(root, 1), UNIT).unit(1000)
    c = UniformSampler(make_seed(124), UNIT).unit(1000)
    assert not np.isin(a, b).any()
    assert not np.isin(a, c).any()
    # Independent streams: the correlation of paired coordinates is within 4/sqrt(n) of 0
    # (standard error of a sample correlation under independence; common practice).
    assert abs(np.corrcoef(a[:, 0], b[:, 0])[0, 1]) < 4 / math.sqrt(1000)


def test_uniform_sampler__blocks_of_one_stream_differ():
    u = UniformSampler(make_seed(5), UNIT).unit(2 * BLOCK)
    assert not np.isin(u[:BLOCK], u[BLOCK:]).any()


def test_uniform_sampler__half_open_unit_square():
    u = UniformSampler(make_seed(31), UNIT).unit(300_000)
    assert u.shape == (300_000, 2) and u.dtype == np.float64
    assert (u >= 0.0).all() and (u < 1.0).all()


def test_uniform_sampler__uniform__kolmogorov_smirnov():
    # Kolmogorov-Smirnov test of each coordinate against U(0, 1) (scipy.stats.kstest), fixed seed;
    # with a fixed seed the outcome is deterministic, and a p-value below 1e-3 means a fault.
    u = UniformSampler(make_seed(8), UNIT).unit(100_000)
    for j in range(2):
        assert stats.kstest(u[:, j], "uniform").pvalue > 1e-3


def test_uniform_sampler__uniform__chi_square_grid():
    # Joint uniformity on a 10 x 10 grid: Pearson chi-square (scipy.stats.chisquare), fixed seed.
    # Catches, e.g., x and y drawn from the same numbers.
    u = UniformSampler(make_seed(8), UNIT).unit(100_000)
    counts, _, _ = np.histogram2d(u[:, 0], u[:, 1], bins=10, range=[[0, 1], [0, 1]])
    assert stats.chisquare(counts.ravel()).pvalue > 1e-3
    assert abs(np.corrcoef(u[:, 0], u[:, 1])[0, 1]) < 4 / math.sqrt(len(u))


class Cube:
    """A domain of 3 uniforms per point (like a density proposal); keeps the last uniforms it mapped."""

    dims = 3
    area = 1.0  # the scale of a hit fraction (a proposal's total)

    def __init__(self):
        self.seen = []

    def map(self, u):
        self.seen.append(u.copy())
        return u[:, 0] + u[:, 2], u[:, 1]


def test_uniform_sampler__three_dims_from_two_child_streams():
    # Uniforms 0, 1 come from the stream child (0,), uniform 2 from the first column of the
    # stream child (1,); each stream is cut in blocks like a 2-d one, block k of stream j being
    # the spawned child (j, k) (numpy reference, numpy_blocks above).  Requests straddle a boundary.
    entropy = 777
    col01 = numpy_blocks(entropy, 2, key=(0,))
    col2 = numpy_blocks(entropy, 2, key=(1,))[:, 0]
    domain = Cube()
    assert isinstance(domain, Domain)
    sampler = UniformSampler(make_seed(entropy), domain)
    u = np.vstack([sampler.unit(BLOCK - 3), sampler.unit(11)])
    n = BLOCK + 8
    assert u.shape == (n, 3)
    np.testing.assert_array_equal(u[:, :2], col01[:n])
    np.testing.assert_array_equal(u[:, 2], col2[:n])
    # random() hands the domain all 3 uniforms of the next points
    x, y = sampler.random(4)
    np.testing.assert_array_equal(domain.seen[-1], np.column_stack([col01[n : n + 4], col2[n : n + 4]]))
    np.testing.assert_array_equal(x, col01[n : n + 4, 0] + col2[n : n + 4])
    np.testing.assert_array_equal(y, col01[n : n + 4, 1])
    # the three uniforms of a point are not the same numbers (independent streams)
    assert abs(np.corrcoef(u[:, 0], u[:, 2])[0, 1]) < 4 / math.sqrt(n)


# --------------------------------------------------------------------------------------------
# The factory
# --------------------------------------------------------------------------------------------


def test_make_sampler__by_name():
    sampler = make_sampler("uniform", make_seed(3), BOX)
    assert isinstance(sampler, UniformSampler) and isinstance(sampler, Sampler)
    assert sampler.name == "uniform" and sampler.domain is BOX
    rx, ry = to_box(numpy_blocks(3, 1)[:50], BOX)
    x, y = sampler.random(50)
    np.testing.assert_array_equal(x, rx)
    np.testing.assert_array_equal(y, ry)


def test_make_sampler__by_class():
    class Antithetic(UniformSampler):
        """1 − u for every uniform (a toy kind, built here)."""

        name = "antithetic"

        def unit(self, n):
            return 1.0 - super().unit(n)

    sampler = make_sampler(Antithetic, make_seed(3), UNIT)
    assert isinstance(sampler, Antithetic) and sampler_name(Antithetic) == "antithetic"
    x, _ = sampler.random(20)
    np.testing.assert_array_equal(x, 1.0 - numpy_blocks(3, 1)[:20, 0])
    # a factory function is also accepted, and named by its __name__
    def plain(seed, domain):
        return UniformSampler(seed, domain)

    assert isinstance(make_sampler(plain, make_seed(3), UNIT), UniformSampler)
    assert sampler_name(plain) == "plain" and sampler_name("uniform") == "uniform"
    assert sampler_name(UniformSampler) == "uniform"


@pytest.mark.parametrize("kind", ["halton", "Uniform", "", 3, None])
def test_make_sampler__unknown_kind(kind):
    with pytest.raises(OptionError, match=r"^sampler: unknown sampler") as info:
        make_sampler(kind, make_seed(1), UNIT)
    assert info.value.param == "sampler"
    assert "uniform" in str(info.value)  # lists the kinds there are


def test_register_sampler__makes_a_new_kind_available(monkeypatch):
    monkeypatch.setattr(samplers_module, "SAMPLERS", dict(SAMPLERS))  # undone after the test

    class Reversed(UniformSampler):
        name = "reversed"

        def unit(self, n):
            return super().unit(n)[:, ::-1]

    with pytest.raises(OptionError):
        make_sampler("reversed", make_seed(2), UNIT)
    register_sampler("reversed", Reversed)
    sampler = make_sampler("reversed", make_seed(2), UNIT)
    assert isinstance(sampler, Reversed)
    x, y = sampler.random(30)
    ref = numpy_blocks(2, 1)[:30]
    np.testing.assert_array_equal(x, ref[:, 1])
    np.testing.assert_array_equal(y, ref[:, 0])
    with pytest.raises(OptionError, match="reversed"):  # the error lists it among the kinds
        make_sampler("nope", make_seed(2), UNIT)


# --------------------------------------------------------------------------------------------
# Boxes
# --------------------------------------------------------------------------------------------


def test_scale_to_box__maps_corners_and_centre():
    box = Box(-3.0, 10.0, 5.0, 12.0)
    u = np.array([[0.0, 0.0], [0.5, 0.5], [0.25, 0.75], [1.0, 1.0]])
    x, y = scale_to_box(u, box)
    np.testing.assert_allclose(x, [-3.0, 1.0, -1.0, 5.0])
    np.testing.assert_allclose(y, [10.0, 11.0, 11.5, 12.0])
    bx, by = box.map(u)
    np.testing.assert_array_equal(bx, x)
    np.testing.assert_array_equal(by, y)


def test_scale_to_box__uniform_in_box():
    box = Box(500_000.0, 5_300_000.0, 510_000.0, 5_320_000.0)
    x, y = UniformSampler(make_seed(2), box).random(50_000)
    assert x.min() >= box.xmin and x.max() < box.xmax and y.min() >= box.ymin and y.max() < box.ymax
    assert stats.kstest(x, "uniform", args=(box.xmin, box.xmax - box.xmin)).pvalue > 1e-3
    assert stats.kstest(y, "uniform", args=(box.ymin, box.ymax - box.ymin)).pvalue > 1e-3


@pytest.mark.parametrize(
    "box",
    [
        Box(0.0, 0.0, 0.0, 1.0),
        Box(0.0, 0.0, 1.0, 0.0),
        Box(0.0, 0.0, -1.0, 1.0),
        Box(0.0, float("nan"), 1.0, 1.0),
        Box(0.0, 0.0, float("inf"), 1.0),
    ],
)
def test_scale_to_box__degenerate_box(box):
    with pytest.raises(ValueError):
        scale_to_box(np.zeros((3, 2)), box)
    with pytest.raises(ValueError):
        UniformSampler(make_seed(1), box).random(3)


def test_box__of_area_intersection():
    a = Box.of((0, 0, 4, 3))
    assert a == Box(0.0, 0.0, 4.0, 3.0) and a.area == 12.0 and a.dims == 2
    assert a.intersection(Box(2, 1, 6, 5)) == Box(2.0, 1.0, 4.0, 3.0)
    assert a.intersection(Box(4, 0, 5, 3)) is None  # touching edges only
    assert a.intersection(Box(10, 10, 11, 11)) is None
