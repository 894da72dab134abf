"""The fair exact baseline of benchmarks/overlap_pairs.py gives the exact pairwise overlaps, without timing anything.

The reference is the plain shapely overlay of every pair of zones (shapely as
the reference library), so the benchmark compares areamc with the right figures.
"""

from __future__ import annotations

import itertools
import sys
from pathlib import Path

import numpy as np
import pytest
import shapely

sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "benchmarks"))

import overlap_pairs  # noqa: E402


def test_exact_overlaps__every_pair_of_positive_area_as_shapely_gives_it():
    zones = overlap_pairs.scene(60)
    i, j, area = overlap_pairs.exact_overlaps(zones)
    expected = {}
    for a, b in itertools.combinations(range(len(zones)), 2):
        inter = shapely.intersection(zones[a], zones[b]).area
        if inter > 0:
            expected[(a, b)] = inter
    assert len(expected) > 20  # the scene overlaps
    got = dict(zip(zip(i.tolist(), j.tolist()), area.tolist()))
    assert got.keys() == expected.keys()
    for pair, value in expected.items():
        assert got[pair] == pytest.approx(value, rel=1e-12)
    assert np.all(i < j)
