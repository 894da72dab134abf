"""The convergence rate of the Sobol sampler on an area, against the published rate for scrambled nets.

Run:  .venv/bin/python benchmarks/sobol_rate.py

Root mean square error of one scrambling's area estimate over 64 independent
scramblings (``scipy.stats.qmc.Sobol``, as ``areamc.samplers.SobolSampler``
draws them), at m = 2^8 ... 2^16 points, for the 10,000-vertex district of
the other benchmarks; the same for plain uniform points.  Prints the fitted
slopes of log RMSE against log m.  Published: plain sampling -1/2; scrambled
nets on the indicator of a set with a rectifiable boundary in two dimensions,
variance O(m^(-3/2)), so an RMSE slope of -3/4 (He & Wang 2015, SIAM J. Numer.
Anal. 53:2488-2503, quoted from memory); Owen (1997) guarantees o(1/m)
variance for every square-integrable integrand.
"""

from __future__ import annotations

import numpy as np
import shapely
from scipy.stats import qmc

from common import wobbly_district

from areamc.samplers import Box


def main() -> None:
    geom = wobbly_district(10_000, ripple=0.02)
    shapely.prepare(geom)
    box = Box.of(geom.bounds)
    exact = geom.area
    ms = [2**k for k in range(8, 17)]
    rows = []
    for m in ms:
        sobol, plain = [], []
        for j in range(64):
            u = qmc.Sobol(d=2, scramble=True, seed=np.random.default_rng([20261202, m, j])).random_base2(m.bit_length() - 1)
            sobol.append(box.area * shapely.contains_xy(geom, *box.map(u)).mean() - exact)
            v = np.random.default_rng([1, m, j]).random((m, 2))
            plain.append(box.area * shapely.contains_xy(geom, *box.map(v)).mean() - exact)
        rows.append((m, np.sqrt(np.mean(np.square(sobol))) / exact, np.sqrt(np.mean(np.square(plain))) / exact))
    print("     m   RMSE sobol   RMSE plain   plain/sobol")
    for m, s, p in rows:
        print(f"{m:6d}   {s:10.2e}   {p:10.2e}   {p / s:8.1f}")
    logm = np.log(ms)
    slope_s = np.polyfit(logm, np.log([r[1] for r in rows]), 1)[0]
    slope_p = np.polyfit(logm, np.log([r[2] for r in rows]), 1)[0]
    print(f"fitted slope: sobol {slope_s:.3f} (published -0.75), plain {slope_p:.3f} (published -0.5)")


if __name__ == "__main__":
    main()
