"""Progress bars on the terminal: `area`'s with the running estimate, and one for the jobs over pairs and regions.

Both show nothing unless stderr is a terminal and ``--quiet`` is off, and
appear only for runs longer than :data:`DELAY` seconds (tqdm's ``delay``).
They only read what the job reports; nothing flows back into the job.
"""

from __future__ import annotations

import sys

from ..estimate import AreaEstimate
from ..units import area_factor

__all__ = ["ProgressBar", "JobBar", "DELAY"]

#: Seconds a run lasts before its bar appears.
DELAY = 0.5
#: Least seconds between two redraws (tqdm's default ``mininterval``).
MININTERVAL = 0.1


def _on_terminal() -> bool:
    return sys.stderr.isatty()


def _open_bar(total: int | None, unit: str, scale: bool):
    """A tqdm bar on stderr that clears itself when closed, or None when stderr is not a terminal."""
    if not _on_terminal():
        return None
    from tqdm import tqdm

    tqdm.monitor_interval = 0  # no monitor thread: worker processes can then be forked (areamc.parallel)
    # miniters=0: every update may redraw (at most every mininterval), so a change of note shows too
    return tqdm(total=total, unit=unit, unit_scale=scale, delay=DELAY, mininterval=MININTERVAL, file=sys.stderr,
                leave=False, miniters=0)


class ProgressBar:
    """Callable progress reporter for ``estimate_areas``-style jobs: ``bar(feature_id, points, estimate)``.

    Shows nothing unless stderr is a terminal and ``quiet`` is False; the bar
    appears only for runs longer than half a second (tqdm's ``delay``).
    """

    def __init__(self, total: int | None, units: str, quiet: bool, unit: str = "pt") -> None:
        self._bar = None
        self._factor = area_factor(units)
        self._units = units
        self._last_id = None
        self._last_n = 0
        if quiet:
            return
        self._bar = _open_bar(total, unit, True)

    def __call__(self, fid: str, points: int, est: AreaEstimate) -> None:
        if self._bar is None:
            return
        if fid != self._last_id:
            self._last_id, self._last_n = fid, 0
        self._bar.set_postfix_str(
            f"{fid}: {est.estimate / self._factor:.6g} {self._units}, std_error {est.std_error / self._factor:.2g}",
            refresh=False,
        )
        self._bar.update(points - self._last_n)
        self._last_n = points

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()


class JobBar:
    """Callable :data:`~areamc.parallel.JobProgress` reporter: ``bar(done, total, unit, note)``.

    The bar counts the job's units (pairs, regions, or points, scaled as 1.2M)
    and shows the note (the item just finished, or the step running, such as
    an exact check) after the count.  A report with another `unit` or `total`
    starts the count afresh.  Nothing shows unless stderr is a terminal and
    ``quiet`` is False, nor for runs shorter than :data:`DELAY` seconds.
    """

    def __init__(self, quiet: bool) -> None:
        self._quiet = quiet
        self._bar = None
        self._key: tuple | None = None
        self._done = 0
        self._note = ""

    def __call__(self, done: int, total: int | None, unit: str, note: str) -> None:
        if self._quiet:
            return
        if (unit, total) != self._key:
            self.close()
            self._key, self._done, self._note = (unit, total), 0, ""
            self._bar = _open_bar(total, unit, unit == "pt")
        if self._bar is None:
            return
        if note != self._note:
            self._note = note
            self._bar.set_postfix_str(note, refresh=False)
        self._bar.update(done - self._done)  # redraws (past the delay, at most every 0.1 s) even when only the note moved
        self._done = done

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None
