"""A progress bar with the running estimate, shown only on a terminal."""

from __future__ import annotations

import sys

from ..estimate import AreaEstimate
from ..units import area_factor

__all__ = ["ProgressBar"]


class ProgressBar:
    """Callable progress reporter for ``estimate_areas``-style jobs.

    Shows nothing unless stderr is a terminal and ``quiet`` is False; the bar
    appears only for runs longer than half a second (tqdm's ``delay``).
    """

    def __init__(self, total: int | None, units: str, quiet: bool, unit: str = "pt") -> None:
        self._bar = None
        self._factor = area_factor(units)
        self._units = units
        self._last_id = None
        self._last_n = 0
        if quiet or not sys.stderr.isatty():
            return
        from tqdm import tqdm

        tqdm.monitor_interval = 0  # no monitor thread: worker processes can then be forked (areamc.parallel)
        self._bar = tqdm(total=total, unit=unit, unit_scale=True, delay=0.5, file=sys.stderr, leave=False)

    def __call__(self, fid: str, points: int, est: AreaEstimate) -> None:
        if self._bar is None:
            return
        if fid != self._last_id:
            self._last_id, self._last_n = fid, 0
        self._bar.update(points - self._last_n)
        self._last_n = points
        self._bar.set_postfix_str(
            f"{fid}: {est.estimate / self._factor:.6g} {self._units}, std_error {est.std_error / self._factor:.2g}",
            refresh=False,
        )

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
