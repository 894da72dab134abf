"""Error rate of claim checks under optional stopping, by simulation.

Run:  .venv/bin/python benchmarks/claim_error_rate.py

The true share sits exactly at the claim (0.9).  Each replicate draws
Bernoulli points in batches of 50, up to 5,000, and stops at the first batch
where the check answers.  We count how often the answer is a false "meets".
Two checks are compared on the same draws:

* areamc's sequential verdict (beta-binomial confidence sequence, Howard et
  al. 2021): its false "meets" rate should stay at or below 1 − confidence;
* a fixed-sample Wilson interval re-checked after every batch ("meets" when
  its lower bound exceeds the claim): the optional-stopping trap.

It also reports how many points the sequential check needs when the truth is
far from the claim.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from areamc.intervals import wilson_interval  # noqa: E402
from areamc.sequential import MEETS, UNDECIDED, verdict  # noqa: E402

CLAIM, CONFIDENCE, BATCH, MAX_POINTS, REPLICATES = 0.9, 0.95, 50, 5000, 4000


def first_answer(draws: np.ndarray, claim: float) -> tuple[str, str, int]:
    """(sequential answer, naive answer, points used by the sequential check)."""
    hits = np.cumsum(draws)
    seq, naive, used = UNDECIDED, UNDECIDED, len(draws)
    for n in range(BATCH, len(draws) + 1, BATCH):
        h = int(hits[n - 1])
        if seq == UNDECIDED:
            seq = verdict(h, n, claim, CONFIDENCE)
            if seq != UNDECIDED:
                used = n
        if naive == UNDECIDED:
            low, high = wilson_interval(h, n, CONFIDENCE)
            naive = MEETS if low > claim else ("falls-short" if high < claim else UNDECIDED)
        if seq != UNDECIDED and naive != UNDECIDED:
            break
    return seq, naive, used


def main() -> None:
    rng = np.random.default_rng(20261201)
    seq_false = naive_false = 0
    for _ in range(REPLICATES):
        seq, naive, _ = first_answer(rng.random(MAX_POINTS) < CLAIM, CLAIM)
        seq_false += seq == MEETS
        naive_false += naive == MEETS
    alpha = 1 - CONFIDENCE
    band = alpha + 3 * np.sqrt(alpha * (1 - alpha) / REPLICATES)
    print(f"true share = claim = {CLAIM}; batches of {BATCH} up to {MAX_POINTS:,} points; {REPLICATES:,} replicates")
    print(f"false 'meets', sequential confidence sequence: {seq_false / REPLICATES:.4f}  (allowed {alpha:.3f}, band {band:.4f})")
    print(f"false 'meets', Wilson re-checked every batch:   {naive_false / REPLICATES:.4f}")
    for truth in (0.99, 0.95, 0.80):
        used = [first_answer(rng.random(MAX_POINTS) < truth, CLAIM)[2] for _ in range(200)]
        print(f"truth {truth:.2f} vs claim {CLAIM}: median points to a verdict {int(np.median(used)):,}")


if __name__ == "__main__":
    main()
