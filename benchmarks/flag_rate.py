"""False-flag rate of the exact-check deviation, summed over the binomial law (no simulation).

Run:  .venv/bin/python benchmarks/flag_rate.py

A hit-or-miss estimate with n points and true fill p0 (exact area over box
area) has hits X ~ Binomial(n, p0).  A correct run is flagged when its
deviation from the exact value exceeds 4; the promised rate is that of a
normal deviate, 2 (1 − Φ(4)) = 6.33e-5.  For each (fill, n) the rate is
Σ_x P(X = x) 1[flagged(x)], over every possible count x, for three rules:

* "at estimate": (p̂ − p0) over the standard error at the estimate, floored
  at the Wilson half-width over z (areamc's rule before the engine rework);
* "at exact": (p̂ − p0) over the standard error at p0;
* "mid-p": areamc's rule now, the normal score of the two-sided mid-p
  binomial tail (areamc.checks.binomial_deviation).

Prints a Markdown table (docs/methods.md holds a copy).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from areamc.checks import FLAG_P, FLAG_Z, binomial_deviation  # noqa: E402
from areamc.intervals import wilson_interval, z_for  # noqa: E402

CASES = [(0.5, 20_000), (0.5, 100_000), (1e-3, 20_000), (1e-3, 100_000), (1e-4, 20_000), (1e-4, 100_000),
         (1e-4, 1_000_000), (0.99, 1_000), (0.999, 1_000), (0.9999, 1_000)]


def rates(p0: float, n: int) -> tuple[float, float, float]:
    x = np.arange(n + 1)
    pmf = stats.binom.pmf(x, n, p0)
    phat = x / n
    se_hat = np.sqrt(phat * (1 - phat) / n)
    low, high = wilson_interval(x, n, 0.95)
    scale = np.maximum(se_hat, (high - low) / 2 / z_for(0.95))
    with np.errstate(divide="ignore", invalid="ignore"):
        z_est = np.where(scale > 0, (phat - p0) / scale, 0.0)
    z_exact = (phat - p0) / np.sqrt(p0 * (1 - p0) / n)
    z_midp = binomial_deviation(x, n, p0)
    return tuple(float(pmf[np.abs(z) > FLAG_Z].sum()) for z in (z_est, z_exact, z_midp))


def main() -> None:
    print(f"promised rate 2(1 - Phi({FLAG_Z:g})) = {FLAG_P:.3g}\n")
    print("| fill | n | at estimate | at exact | mid-p (areamc) |")
    print("|---|---|---|---|---|")
    for p0, n in CASES:
        cells = [f"{r:.2g} ({r / FLAG_P:.2f}x)" for r in rates(p0, n)]
        print(f"| {p0:g} | {n:,} | " + " | ".join(cells) + " |")


if __name__ == "__main__":
    main()
