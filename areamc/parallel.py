"""Worker processes for independent estimates, with results bit-identical to one worker.

Every estimate areamc makes draws from its own stream, keyed by job and by
position (:func:`~areamc.seeds.child_seed`), and its sums are merged in a
fixed order (:mod:`areamc.engine`).  So the estimates of one job are
independent computations: they may run in any process, in any order, and
give the same bits.  This module runs them in a pool of processes and hands
the results back in item order.

* :func:`map_ordered` runs a top-level function over items (feature, pair
  or region indices) and returns the results in item order; with one worker
  or one item it is a plain loop in the calling process.  The job's shared
  data go to each worker once, by the pool's initializer (inherited memory
  under the "fork" start method, one pickle per worker under "spawn"); tasks
  carry only the items.  Warnings raised in a worker are re-emitted in the
  parent in item order, and the error of the first failing item is raised
  as a one-worker run would raise it.
* :func:`source_handle` makes a density source fit to travel: a raster is
  reopened by its path in each worker, never shared as an open file.
* :func:`fixed_count_sums` splits one fixed-count run by stream position
  across workers and merges the sums in stream order, bit-identical to
  :func:`~areamc.engine.accumulate`.

Nothing here depends on units or CRSs: items, shared data and results are
whatever the job passes (plane metres throughout areamc's jobs).
"""

from __future__ import annotations

import math
import multiprocessing
import multiprocessing.util
import os
import pickle
import signal
import sys
import threading
import traceback
import warnings
from concurrent.futures import ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from typing import Any, Callable, Iterable, Sequence

import numpy as np

from .errors import AreamcError, AreamcWarning, OptionError

__all__ = [
    "MAX_WORKERS",
    "usable_cores",
    "check_workers",
    "map_ordered",
    "SourceHandle",
    "source_handle",
    "workers_for_source",
    "fixed_count_sums",
    "WorkerTraceback",
    "JobProgress",
    "JobMeter",
]

#: Most worker processes one job may start (parameter ``workers``); more only cost memory.
MAX_WORKERS = 256

# Set in worker processes by the pool's initializer.
_IN_WORKER = False
_STATE: Any = None
_SETUP_ERROR: tuple[BaseException, str] | None = None


def usable_cores() -> int:
    """CPU cores this process may run on: ``os.process_cpu_count()`` (Python 3.13+), else the
    affinity mask (``os.sched_getaffinity``), else ``os.cpu_count()``; at least 1."""
    count = getattr(os, "process_cpu_count", None)
    if count is not None:
        n = count()
    elif hasattr(os, "sched_getaffinity"):
        n = len(os.sched_getaffinity(0))
    else:
        n = os.cpu_count()
    return max(1, int(n or 1))


def check_workers(workers) -> int:
    """Validate a worker count: a whole number from 1 to :data:`MAX_WORKERS`; None means every usable core.

    Raises
    ------
    OptionError
        For anything else (parameter ``workers``).
    """
    if workers is None:
        return min(usable_cores(), MAX_WORKERS)
    if isinstance(workers, bool) or not isinstance(workers, (int, np.integer)):
        raise OptionError(f"{{param}}: must be a positive whole number, got {workers!r}", param="workers")
    if not 1 <= workers <= MAX_WORKERS:
        raise OptionError(f"{{param}}: must be a whole number from 1 to {MAX_WORKERS}, got {workers!r}",
                          param="workers")
    return int(workers)


class WorkerTraceback(Exception):
    """The traceback of an error raised in a worker process, attached as its ``__cause__``."""

    def __init__(self, text: str) -> None:
        super().__init__(text)
        self.text = text

    def __str__(self) -> str:
        return f"\n\"\"\"\n{self.text}\"\"\""


def map_ordered(
    fn: Callable[[Any, Any], Any],
    items: Iterable,
    workers: int | None = 1,
    *,
    shared: Any = None,
    setup: Callable[[Any], Any] | None = None,
    done: Callable[[int, Any], None] | None = None,
) -> list:
    """Return ``[fn(state, item) for item in items]``, computed in up to `workers` processes.

    Parameters
    ----------
    fn : callable
        A top-level (picklable) function ``fn(state, item)``.  Its result must
        depend only on `state` and `item`, not on the process or on the order
        of items; it is pickled back to the parent (floats exactly).
    items : iterable
        Small picklable values (indices); tasks carry only these.
    workers : int or None
        Worker processes (None: every usable core; see :func:`check_workers`).
        With one worker, one item, or when already inside a worker, ``fn``
        runs in a plain loop in this process.
    shared : object
        The job's data, sent once to each worker: inherited under the "fork"
        start method (used on Linux when this process runs a single thread),
        pickled once per worker under "spawn" (elsewhere).  Under "spawn" it
        must pickle, and the caller's ``__main__`` must be import-safe.
    setup : callable, optional
        ``setup(shared) -> state``, run once in each process that runs items
        (the parent itself with one worker): prepare geometries, build an
        index.  Default: ``state = shared``.
    done : callable, optional
        ``done(k, result)``, called in this process in item order as each
        result is ready (progress can be reported per item, not per chunk).

    Returns
    -------
    list
        The results, in item order.

    Notes
    -----
    Warnings raised in a worker are recorded there and re-emitted here, in
    item order, through this process's filters.  If items fail, the error of
    the first failing item is raised (with the worker's traceback as its
    ``__cause__``) after the warnings of the items before it, exactly as a
    one-worker loop would stop; the remaining workers are terminated.
    Worker processes ignore SIGINT: Ctrl-C reaches this process, which stops
    them.  A worker that dies (killed for memory, say) raises
    :class:`~areamc.errors.AreamcError` naming ``workers``.
    """
    items = list(items)
    count = min(check_workers(workers), len(items))
    if count <= 1 or _IN_WORKER:
        state = setup(shared) if setup is not None else shared
        out = []
        for k, item in enumerate(items):
            out.append(fn(state, item))
            if done is not None:
                done(k, out[-1])
        return out
    context = _start_method()
    if context.get_start_method() != "fork" and not _picklable((fn, shared, setup)):
        warnings.warn(AreamcWarning(
            "{param}: this job's data cannot be sent to worker processes started by spawn; running on one worker",
            param="workers"), stacklevel=2)
        return map_ordered(fn, items, 1, shared=shared, setup=setup, done=done)
    return _run_pool(fn, items, count, context, shared, setup, done)


#: ``progress(done, total, unit, note)``: how far a job over many items has got (parameter ``progress`` of
#: :func:`~areamc.overlap.estimate_overlaps`, :func:`~areamc.coverage.estimate_coverage` and
#: :func:`~areamc.integrate.integrate_density`).  `done` of `total` units are finished, `unit` saying
#: what they are: ``"pair"``, ``"region"``, or ``"pt"`` for the points of one long estimate (overlap's
#: shared sample; `total` is None when a precision target decides the points).  `note` names the item
#: just finished or the step now running (``"exact intersection areas"``, ``"r3: exact shares"``,
#: ``"exact profile"``).  See :class:`JobMeter`.
JobProgress = Callable[[int, "int | None", str, str], None]


class JobMeter:
    """One job's reports to a :data:`JobProgress` callback (or to none): its `total` and `unit` are fixed.

    The job calls the meter with ``(done, note)``: first with 0, then as
    items finish (:meth:`items`, in item order, from this process) and,
    while items run in this process, between the steps of an item (exact
    checks, chunks of points) with `done` unchanged.  So `done` never falls
    and, once the job is through, equals `total` (unless a time limit
    stopped a run early).  Reports never change a result: nothing they see
    feeds back into sampling.  Nothing here depends on units or CRSs.
    """

    def __init__(self, progress: JobProgress | None, total: int | None, unit: str) -> None:
        self.progress = progress
        self.total = total
        self.unit = unit

    def __call__(self, done: int, note: str = "") -> None:
        if self.progress is not None:
            self.progress(int(done), self.total, self.unit, note)

    def here(self, workers: int, items: int) -> "JobMeter | None":
        """The meter for the items themselves when :func:`map_ordered` runs `items` items in this process
        (one worker, one item, or already inside a worker), else None: a worker cannot report here."""
        if self.progress is None or not (min(workers, items) <= 1 or _IN_WORKER):
            return None
        return self

    def items(self, label: Callable[[int], str], skip: int = 0) -> Callable[[int, Any], None] | None:
        """A `done` callback for :func:`map_ordered`: item ``k`` finished is reported as ``k + 1 - skip``
        done, noted ``label(k)``; the first `skip` items (not counted, such as overlap's multiplicity
        profile) only change the note."""
        if self.progress is None:
            return None

        def done(k: int, _result) -> None:
            self(max(0, k + 1 - skip), label(k))

        return done


def _start_method():
    """The "fork" context on Linux when this process runs one thread (forking threads can deadlock) and its
    PROJ and GDAL reopen their SQLite database in a forked child; else "spawn"."""
    if (sys.platform.startswith("linux") and "fork" in multiprocessing.get_all_start_methods()
            and threading.active_count() == 1 and _fork_safe_libraries()):
        return multiprocessing.get_context("fork")
    return multiprocessing.get_context("spawn")


def _version(text: str) -> tuple[int, ...]:
    return tuple(int(part) for part in text.split(".")[:2] if part.isdigit())


def _fork_safe_libraries() -> bool:
    """PROJ 8.2+ (OSGeo/PROJ pull request 2845) and GDAL 3.1+ (OSGeo/gdal pull request 2222) use their
    proj.db handle safely across fork(); older ones may corrupt reads of it in a child."""
    pyproj = sys.modules.get("pyproj")
    if pyproj is not None and _version(pyproj.proj_version_str) < (8, 2):
        return False
    rasterio = sys.modules.get("rasterio")
    return rasterio is None or _version(rasterio.__gdal_version__) >= (3, 1)


def _picklable(obj) -> bool:
    try:
        pickle.dumps(obj)
    except Exception:
        return False
    return True


def _batches(items: Sequence, workers: int) -> list[list]:
    """Consecutive runs of items: one item each up to 32 items per worker (the load balances best), then
    longer runs, of at most 16 items, so that thousands of small items do not cost a task each."""
    size = max(1, min(16, len(items) // (32 * workers)))
    return [list(range(k, min(k + size, len(items)))) for k in range(0, len(items), size)]


def _run_pool(fn, items, count, context, shared, setup, done) -> list:
    executor = ProcessPoolExecutor(count, mp_context=context, initializer=_start_worker, initargs=(shared, setup))
    processes: list = []
    try:
        futures = [(batch, executor.submit(_run_batch, fn, [items[k] for k in batch]))
                   for batch in _batches(items, count)]
        processes = list((getattr(executor, "_processes", None) or {}).values())
        out = []
        for batch, future in futures:
            try:
                outcomes = future.result()
            except BrokenProcessPool as err:
                raise AreamcError(
                    "{param}: a worker process ended abruptly (out of memory?); run with {param} = 1 to see why",
                    param="workers") from err
            for k, (value, error, text, caught) in zip(batch, outcomes):
                _reemit(caught)
                if error is not None:
                    error.__cause__ = WorkerTraceback(text)
                    raise error
                out.append(value)
                if done is not None:
                    done(k, value)
    except BaseException:
        processes = processes or list((getattr(executor, "_processes", None) or {}).values())
        _stop(executor, processes)
        raise
    executor.shutdown(wait=True)
    return out


def _stop(executor, processes) -> None:
    """Cancel what has not started, terminate the workers (no public way before Python 3.14), and wait
    for the pool's own thread, so that this process is back to one thread (and may fork) afterwards."""
    manager = getattr(executor, "_executor_manager_thread", None)
    executor.shutdown(wait=False, cancel_futures=True)
    for process in processes:
        if process.is_alive():
            process.terminate()
    for process in processes:
        process.join(5)
    if manager is not None and manager is not threading.current_thread():
        manager.join(5)


def _start_worker(shared, setup) -> None:
    """Pool initializer: signals as a worker needs them, then the job's state, once per process."""
    global _IN_WORKER, _STATE, _SETUP_ERROR
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent handles Ctrl-C and stops the pool
    signal.signal(signal.SIGTERM, signal.SIG_DFL)  # a forked child must not inherit the CLI's handler
    _IN_WORKER = True
    try:
        _STATE = setup(shared) if setup is not None else shared
    except BaseException as err:  # reported with the first task, as the parent would have raised it
        _SETUP_ERROR = (_portable_error(err), traceback.format_exc())


def _run_batch(fn, batch) -> list[tuple]:
    """Run items in a worker; each outcome is (result, error, traceback text, warnings)."""
    out = []
    for item in batch:
        if _SETUP_ERROR is not None:
            out.append((None, *_SETUP_ERROR, []))
            break
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                value, error, text = fn(_STATE, item), None, ""
            except Exception as err:
                value, error, text = None, _portable_error(err), traceback.format_exc()
        out.append((value, error, text, [_portable_warning(w) for w in caught]))
        if error is not None:
            break  # a one-worker loop stops here too
    return out


def _portable_error(err: BaseException) -> BaseException:
    """The error itself if it survives pickling with its message, else a RuntimeError that says what it was."""
    try:
        copy = pickle.loads(pickle.dumps(err))
    except Exception:
        copy = None
    if copy is not None and str(copy) == str(err):
        return err
    return RuntimeError(f"{type(err).__name__}: {err}")


def _portable_warning(w: warnings.WarningMessage) -> tuple:
    message = w.message if _picklable(w.message) else str(w.message)
    category = w.category if _picklable(w.category) else UserWarning
    return message, category, w.filename, w.lineno


def _reemit(caught) -> None:
    """Re-emit a worker's warnings here, under this process's filters, as if raised where they were."""
    for message, category, filename, lineno in caught:
        module = _module_of(filename)
        registry = sys.modules[module].__dict__.setdefault("__warningregistry__", {}) if module in sys.modules else None
        warnings.warn_explicit(message, category, filename, lineno, module=module, registry=registry)


def _module_of(filename: str) -> str:
    for name, module in list(sys.modules.items()):
        if getattr(module, "__file__", None) == filename:
            return name
    return os.path.splitext(os.path.basename(filename))[0]


# -- density sources ----------------------------------------------------------

class SourceHandle:
    """A density source that can reach worker processes.

    In the process that made it, :meth:`get` returns the source itself.  In
    a worker (forked or spawned) it returns that worker's own copy: a
    :class:`~areamc.density.RasterDensity` is opened anew from its path,
    plane, value kind and band (an open rasterio dataset must not be shared
    between processes: they would share one file offset); sources held in
    memory (blocks, expressions) are used as inherited, or as unpickled.

    `travels` is False for a source of another kind that does not pickle
    (it may hold a file or a connection); a job then runs on one worker.
    """

    def __init__(self, source) -> None:
        self._source = source
        self._pid = os.getpid()
        self._local = None
        self._recipe = _raster_recipe(source)
        self.travels = source is None or self._recipe is not None or _known_in_memory(source) or _picklable(source)

    def get(self):
        """The source for this process (plane metres; densities per m², as the source gives them)."""
        if os.getpid() == self._pid or (self._source is None and self._recipe is None):
            return self._source
        if self._local is None:
            self._local = self._open()
        return self._local

    def _open(self):
        if self._recipe is None:
            return self._source
        from .density import RasterDensity

        path, plane, values, band = self._recipe
        raster = RasterDensity(path, plane, values=values, band=band)
        multiprocessing.util.Finalize(raster, raster.close, exitpriority=10)
        return raster

    def __getstate__(self) -> dict:
        state = dict(self.__dict__)
        state["_local"] = None
        if self._recipe is not None:
            state["_source"] = None  # travels as its recipe
        return state


def source_handle(source) -> SourceHandle:
    """Wrap a density source (or None) for :func:`map_ordered`; see :class:`SourceHandle`."""
    return SourceHandle(source)


def _raster_recipe(source):
    from .density import RasterDensity

    if isinstance(source, RasterDensity):
        return (source.path, source.plane, source.values, source.band)
    return None


def _known_in_memory(source) -> bool:
    from .density import BlockDensity, ExpressionDensity

    return type(source) in (BlockDensity, ExpressionDensity)


def workers_for_source(workers: int, handle: SourceHandle, items: int) -> int:
    """`workers`, or 1 with a warning when the source cannot travel and more than one worker would run."""
    if handle.travels or workers <= 1 or items <= 1:
        return workers
    label = getattr(handle.get(), "label", type(handle.get()).__name__)
    warnings.warn(AreamcWarning(
        f"{{param}}: the density source ({label}) cannot be sent to worker processes (it does not pickle); "
        "running on one worker", param="workers"), stacklevel=3)
    return 1


# -- one run split by stream position -------------------------------------------

#: Stream positions per span of :func:`fixed_count_sums`: a multiple of the uniform sampler's
#: block (65,536) and of the engine's summation block (4,096), so a span never cuts either.
SPAN_UNIT = 1 << 16


def fixed_count_sums(sampler, evaluate, points: int, workers: int | None = 1, *, chunk: int | None = None):
    """The sums of a fixed-count run, its stream cut into spans that workers compute, merged in stream order.

    Gives the same :class:`~areamc.engine.Sums` as ``accumulate(sampler.random, evaluate,
    Stopper(StopRule(points=points)), chunk=chunk)``, to the last bit: hit counts add
    exactly in any order, and real-valued scores are reduced per block of
    :data:`~areamc.engine.SUM_BLOCK` stream positions (each block left to
    right) in the workers and the block totals folded left to right here,
    which is the engine's own order.  No trace, no time budget, no precision
    target (those decide at chunk ends, in order).

    Parameters
    ----------
    sampler : Sampler
        Points in plane metres; its stream is read from its current
        position on, and that position is moved on by `points`, as the
        engine would.  Its points must depend only on their stream position.
    evaluate : callable
        ``evaluate(x, y)``: scores of shape ``(n,)`` or ``(n, m)`` (bools or floats).
    points : int
        Points of the run.
    workers : int or None
        See :func:`check_workers`.  Under "fork" the sampler and `evaluate`
        (closures too) are inherited; under "spawn" they must pickle, else
        the run is made here.
    chunk : int, optional
        Points per draw in a worker (memory bound; default the engine's).
    """
    from .engine import DEFAULT_CHUNK, SUM_BLOCK, Sums, _check_positive
    from .stopping import BUDGET

    _check_positive(points, "points")
    chunk = DEFAULT_CHUNK if chunk is None else chunk
    _check_positive(chunk, "chunk")
    workers = check_workers(workers)
    start = int(sampler.generated)
    span = SPAN_UNIT * max(1, math.ceil(points / (4 * workers * SPAN_UNIT)))
    spans = [(start + s, min(span, points - s), max(SUM_BLOCK, chunk // SUM_BLOCK * SUM_BLOCK))
             for s in range(0, points, span)]
    parts = map_ordered(_span_sums, spans, workers, shared=(sampler, evaluate))
    sampler.reset()
    sampler.fast_forward(start + points)
    exact = parts[0][0]
    if exact:
        sums = sum((p[1] for p in parts[1:]), parts[0][1])
        sumsq = sum((p[2] for p in parts[1:]), parts[0][2])
    else:
        totals = np.concatenate([p[1] for p in parts])
        squares = np.concatenate([p[2] for p in parts])
        zero = np.zeros((1, totals.shape[1]))
        sums = np.cumsum(np.vstack([zero, totals]), axis=0)[-1]
        sumsq = np.cumsum(np.vstack([zero, squares]), axis=0)[-1]
    return Sums(points, sums, sumsq, (), BUDGET)


def _span_sums(state, span) -> tuple:
    """One span's sums: (True, sums, sumsq) for hit counts, (False, block totals, block square totals) for reals."""
    from .engine import SUM_BLOCK, score_columns

    sampler, evaluate = state
    first, n, step = span
    sampler.reset()
    sampler.fast_forward(first)
    totals, squares, exact = [], [], None
    drawn = 0
    while drawn < n:
        m = min(step, n - drawn)
        x, y = sampler.random(m)
        scores = score_columns(evaluate(x, y))
        if exact is None:
            exact = bool(np.issubdtype(scores.dtype, np.integer))
        if exact:
            totals.append(scores.sum(axis=0))
            squares.append((scores * scores).sum(axis=0))
        else:
            rows = scores.astype(np.float64, copy=False)
            for k in range(0, m, SUM_BLOCK):  # whole blocks, and the run's last partial one
                block = rows[k:k + SUM_BLOCK]
                totals.append(np.cumsum(block, axis=0)[-1])
                squares.append(np.cumsum(block * block, axis=0)[-1])
        drawn += m
    if exact:
        return True, np.sum(totals, axis=0), np.sum(squares, axis=0)
    return False, np.vstack(totals), np.vstack(squares)
