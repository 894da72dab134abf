"""Tests of ``areamc.seeds``: normalised seeds and keyed, independent child streams.

Reference: numpy's ``SeedSequence.spawn`` ("Parallel random number generation" guide in the
numpy documentation): the k-th spawned child of a sequence has spawn key ``(..., k)``, and
children made that way never share a stream.
"""

from __future__ import annotations

import numpy as np
import pytest

from areamc.errors import OptionError
from areamc.samplers import Box, UniformSampler
from areamc.seeds import JOB_KEYS, child_seed, job_root, make_seed

UNIT = Box(0.0, 0.0, 1.0, 1.0)


def test_make_seed__int_and_passthrough():
    seq = make_seed(42)
    assert isinstance(seq, np.random.SeedSequence) and seq.entropy == 42
    assert make_seed(seq) is seq
    assert make_seed(np.int64(42)).entropy == 42


def test_make_seed__none_draws_fresh_entropy():
    a, b = make_seed(None), make_seed(None)
    assert a.entropy != b.entropy
    # The recorded entropy replays the stream (what lets a run without a seed be replayed).
    np.testing.assert_array_equal(UniformSampler(a, UNIT).unit(10), UniformSampler(make_seed(int(a.entropy)), UNIT).unit(10))


@pytest.mark.parametrize("seed", [-1, 1.5, "7", [1, 2], True])
def test_make_seed__invalid(seed):
    # library messages name the Python parameter ("seed: ..."), not a command-line flag
    with pytest.raises(OptionError, match=r"^seed: must be a non-negative whole number") as info:
        make_seed(seed)
    assert info.value.param == "seed"


def test_child_seed__matches_seedsequence_spawn():
    # numpy's SeedSequence.spawn is the reference for keyed children: the k-th spawned child has
    # spawn_key (k,), and its j-th child (k, j).
    root = make_seed(2024)
    spawned = np.random.SeedSequence(2024).spawn(4)
    for k in range(4):
        np.testing.assert_array_equal(child_seed(root, k).generate_state(4), spawned[k].generate_state(4))
    grand = spawned[3].spawn(3)[2]
    np.testing.assert_array_equal(child_seed(root, 3, 2).generate_state(4), grand.generate_state(4))
    np.testing.assert_array_equal(child_seed(child_seed(root, 3), 2).generate_state(4), grand.generate_state(4))


def test_job_root__is_the_spawned_child_at_the_jobs_key():
    # Each job's streams hang off the root's child at JOB_KEYS[job] (numpy spawn as reference),
    # so two jobs on one seed never share points.
    assert len(set(JOB_KEYS.values())) == len(JOB_KEYS)
    spawned = np.random.SeedSequence(99).spawn(max(JOB_KEYS.values()) + 1)
    states = {}
    for job, key in JOB_KEYS.items():
        got = job_root(make_seed(99), job)
        assert tuple(got.spawn_key) == (key,)
        np.testing.assert_array_equal(got.generate_state(4), spawned[key].generate_state(4))
        states[job] = tuple(got.generate_state(4))
    assert len(set(states.values())) == len(JOB_KEYS)
