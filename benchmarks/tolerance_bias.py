"""Bias of precision-target stopping: stopping at the first chunk that meets the target, against two stages.

Run:  .venv/bin/python benchmarks/tolerance_bias.py [replicates]

A strip of fill p = 0.001 in the unit box (a point hits when x < p) is
estimated to a relative half-width target, in chunks of 4,096 points, over
many seeds.  Two rules, on the same engine and sampler:

* "one stage": stop at the first chunk whose Wilson half-width meets the
  target, and report those points (areamc's rule before the engine rework);
* "two stages": areamc's rule now (areamc.stopping): a pilot to twice the
  target, then a fresh final batch of the size the pilot says is needed.

Prints the mean relative error of the estimate with its standard error, the
mean points drawn, and the mean reported half-width over the target.
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from areamc.engine import hit_or_miss  # noqa: E402
from areamc.estimate import area_precision  # noqa: E402
from areamc.samplers import Box, UniformSampler  # noqa: E402
from areamc.seeds import make_seed  # noqa: E402
from areamc.stopping import BUDGET, TARGET, StopRule, Stopper  # noqa: E402

FILL = 1e-3
CHUNK = 4096
BOX = Box(0.0, 0.0, 1.0, 1.0)


class OneStage(Stopper):
    """Stop at the first chunk that meets the target, with no final batch."""

    @property
    def two_stage(self) -> bool:
        return False

    @property
    def budget(self) -> int:
        return self.rule.point_budget

    def reason(self, sums, sumsq, points):
        if all(self.rule.met(hw, est) for hw, est in self._precision(sums, sumsq, points)):
            return TARGET
        return None if points < self.budget else BUDGET


def run(rule: StopRule, kind, seed: int):
    stopper = kind(rule, precision=area_precision(BOX.area, 0.95))
    result = hit_or_miss(UniformSampler(make_seed(seed), BOX), lambda x, y: x < FILL, stopper, chunk=CHUNK)
    est = result.estimate(0, 0.95)
    return est.estimate, result.points + result.pilot_points, est.half_width / rule.target(est.estimate)


def main() -> None:
    replicates = int(sys.argv[1]) if len(sys.argv) > 1 else 2000
    print(f"fill {FILL:g}, chunks of {CHUNK:,}, {replicates:,} seeds per row")
    print("| target | rule | mean relative error (± s.e.) | mean points drawn | mean half-width / target |")
    print("|---|---|---|---|---|")
    for relative in (0.2, 0.3):
        rule = StopRule(points=None, relative=relative, max_points=10_000_000)
        for name, kind in (("one stage", OneStage), ("two stages", Stopper)):
            out = np.array([run(rule, kind, seed) for seed in range(replicates)])
            err = out[:, 0] / FILL - 1
            print(f"| {relative:.0%} | {name} | {err.mean():+.2%} (± {err.std(ddof=1) / math.sqrt(len(err)):.2%}) "
                  f"| {out[:, 1].mean():,.0f} | {out[:, 2].mean():.3f} |")


if __name__ == "__main__":
    main()
