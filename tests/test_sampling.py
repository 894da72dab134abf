"""Tests of areamc.sampling: seeds, the uniform sampler and mapping to a box."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from areamc.errors import OptionError
from areamc.sampling import BLOCK, Box, UniformSampler, child_seed, make_seed, scale_to_box


# --------------------------------------------------------------------------------------------
# Seeds
# --------------------------------------------------------------------------------------------


def test_make_seed__int_and_passthrough():
    seq = make_seed(42)
    assert isinstance(seq, np.random.SeedSequence) and seq.entropy == 42
    assert make_seed(seq) is seq
    assert make_seed(np.int64(42)).entropy == 42


def test_make_seed__none_draws_fresh_entropy():
    a, b = make_seed(None), make_seed(None)
    assert a.entropy != b.entropy
    # The recorded entropy replays the stream (needed for "--seed <entropy>").
    np.testing.assert_array_equal(UniformSampler(a).random(10), UniformSampler(make_seed(int(a.entropy))).random(10))


@pytest.mark.parametrize("seed", [-1, 1.5, "7", [1, 2]])
def test_make_seed__invalid(seed):
    with pytest.raises(OptionError):
        make_seed(seed)


def test_child_seed__matches_seedsequence_spawn():
    # numpy's SeedSequence.spawn is the reference for keyed children ("Parallel random number
    # generation" guide): the k-th spawned child has spawn_key (k,).
    root = make_seed(2024)
    spawned = np.random.SeedSequence(2024).spawn(4)
    for k in range(4):
        np.testing.assert_array_equal(child_seed(root, k).generate_state(4), spawned[k].generate_state(4))
    grand = spawned[3].spawn(3)[2]
    np.testing.assert_array_equal(child_seed(root, 3, 2).generate_state(4), grand.generate_state(4))
    np.testing.assert_array_equal(child_seed(child_seed(root, 3), 2).generate_state(4), grand.generate_state(4))


# --------------------------------------------------------------------------------------------
# The uniform sampler
# --------------------------------------------------------------------------------------------


def test_uniform_sampler__same_points_for_any_request_sizes():
    # Requests that cross block boundaries (BLOCK = 65536) in odd places.
    n = 2 * BLOCK + 12_345
    whole = UniformSampler(make_seed(9)).random(n)
    sampler = UniformSampler(make_seed(9))
    sizes = [1, BLOCK - 2, 3, 1000, BLOCK, n - (1 + BLOCK - 2 + 3 + 1000 + BLOCK)]
    pieces = [sampler.random(s) for s in sizes]
    assert sampler.generated == n
    np.testing.assert_array_equal(np.vstack(pieces), whole)


def test_uniform_sampler__reset_replays():
    sampler = UniformSampler(make_seed(9))
    first = sampler.random(BLOCK + 10)
    sampler.reset()
    assert sampler.generated == 0
    np.testing.assert_array_equal(sampler.random(BLOCK + 10), first)


def test_uniform_sampler__zero_points():
    out = UniformSampler(make_seed(1)).random(0)
    assert out.shape == (0, 2)


def test_uniform_sampler__children_differ():
    root = make_seed(123)
    a = UniformSampler(child_seed(root, 0)).random(1000)
    b = UniformSampler(child_seed(root, 1)).random(1000)
    c = UniformSampler(make_seed(124)).random(1000)
    assert not np.isin(a, b).any()
    assert not np.isin(a, c).any()
    # Independent streams: the correlation of paired coordinates is within 4/sqrt(n) of 0
    # (standard error of a sample correlation under independence; fact of the trade).
    assert abs(np.corrcoef(a[:, 0], b[:, 0])[0, 1]) < 4 / math.sqrt(1000)


def test_uniform_sampler__blocks_of_one_stream_differ():
    u = UniformSampler(make_seed(5)).random(2 * BLOCK)
    assert not np.isin(u[:BLOCK], u[BLOCK:]).any()


def test_uniform_sampler__half_open_unit_square():
    u = UniformSampler(make_seed(31)).random(300_000)
    assert u.shape == (300_000, 2) and u.dtype == np.float64
    assert (u >= 0.0).all() and (u < 1.0).all()


def test_uniform_sampler__uniform__kolmogorov_smirnov():
    # Kolmogorov-Smirnov test of each coordinate against U(0, 1) (scipy.stats.kstest), fixed seed;
    # with a fixed seed the outcome is deterministic, and a p-value below 1e-3 means a fault.
    u = UniformSampler(make_seed(8)).random(100_000)
    for j in range(2):
        assert stats.kstest(u[:, j], "uniform").pvalue > 1e-3


def test_uniform_sampler__uniform__chi_square_grid():
    # Joint uniformity on a 10 x 10 grid: Pearson chi-square (scipy.stats.chisquare), fixed seed.
    # Catches, e.g., x and y drawn from the same numbers.
    u = UniformSampler(make_seed(8)).random(100_000)
    counts, _, _ = np.histogram2d(u[:, 0], u[:, 1], bins=10, range=[[0, 1], [0, 1]])
    assert stats.chisquare(counts.ravel()).pvalue > 1e-3
    assert abs(np.corrcoef(u[:, 0], u[:, 1])[0, 1]) < 4 / math.sqrt(len(u))


# --------------------------------------------------------------------------------------------
# Boxes
# --------------------------------------------------------------------------------------------


def test_scale_to_box__maps_corners_and_centre():
    box = Box(-3.0, 10.0, 5.0, 12.0)
    u = np.array([[0.0, 0.0], [0.5, 0.5], [0.25, 0.75], [1.0, 1.0]])
    x, y = scale_to_box(u, box)
    np.testing.assert_allclose(x, [-3.0, 1.0, -1.0, 5.0])
    np.testing.assert_allclose(y, [10.0, 11.0, 11.5, 12.0])


def test_scale_to_box__uniform_in_box():
    box = Box(500_000.0, 5_300_000.0, 510_000.0, 5_320_000.0)
    x, y = scale_to_box(UniformSampler(make_seed(2)).random(50_000), box)
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


def test_box__of_area_intersection():
    a = Box.of((0, 0, 4, 3))
    assert a == Box(0.0, 0.0, 4.0, 3.0) and a.area == 12.0
    assert a.intersection(Box(2, 1, 6, 5)) == Box(2.0, 1.0, 4.0, 3.0)
    assert a.intersection(Box(4, 0, 5, 3)) is None  # touching edges only
    assert a.intersection(Box(10, 10, 11, 11)) is None
