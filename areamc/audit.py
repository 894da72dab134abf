"""Run a checked plan (:mod:`areamc.plan`) and write its results folder: ``areamc audit``.

Each job of the plan is its command's own run: its command line (:attr:`PlanJob.argv`) is
parsed by ``areamc.cli.build_parser()`` and computed by the command's ``compute``
(:class:`areamc.cli.common.Outcome`), so a job gives exactly what the command gives for the
same options and seed.  What a job hands back (:func:`run_job`) is plain data: its rows and
metadata (areas in m² of the job's equal-area plane), the area job's running estimates,
overlap's multiplicity rows, the table's columns and field types, and the features the results
GeoPackage gets (geometries as WKB in the input layer's CRS, the inputs' attributes).  That
payload is written, as one JSON line, to the journal of the results folder as soon as the job
is done (``journal.jsonl``, flushed and fsynced), and the results files are always written
from the journal's lines, whether the jobs ran just now, ran before a crash
(``resume=True`` skips them), or ran on a Dask cluster: so a resumed or distributed audit ends
with the same results as an uninterrupted local one.

The results folder (every file written atomically, all renamed into place together at the end):

``results.csv``, ``results.json``
    Every job's rows, each with the job's name (``job``) and area unit (``units``), areas
    converted to that unit; the CSV has the union of the jobs' fields.
``results.gpkg``
    One layer per finished job, named after it: the input geometries (overlap: the
    intersections) with their attributes and the result fields, units in the layer's
    description, the job's metadata in the GeoPackage's metadata
    (:func:`areamc.cli.common.write_feature_rows`).
``manifest.json``
    Tool, Python and library versions, the SHA-256 of the plan and of every input file, the
    plan's seed (a string), plane, start and end times (ISO 8601, UTC), each job's status
    (``done``, ``failed``), seconds, seed and plane, the claims per job and k, and the gate.
``report.html``
    :func:`areamc.report.write_report`.
``journal.jsonl``
    The journal: a header line, then one line per finished job.

Scale: locally the jobs run one after another, each with the plan's ``workers`` processes (as the
commands share regions, pairs and features).  With ``scheduler="tcp://HOST:PORT"`` every job is
submitted to that Dask distributed cluster (``client.submit(run_job, argv)``): what travels is
the job's command line, with absolute input paths, so every worker must see the input files
under the same paths; a job on a Dask worker runs on one process (a worker process cannot
start a pool of its own), which changes no result: the commands give the same results to the
last bit for any number of workers.
"""

from __future__ import annotations

import json
import multiprocessing
import os
import re
import sys
import time
import warnings
from dataclasses import dataclass, field
from typing import Callable, Iterable, Mapping, Sequence

from . import __version__
from .errors import AreamcError, AreamcNotice, AreamcWarning, OptionError
from .output import OutputBatch, json_safe, render, write_json, write_text
from .runinfo import file_digests, utc_now, versions

__all__ = [
    "AuditResult",
    "JobResult",
    "JobInput",
    "ClaimSummary",
    "run_audit",
    "run_job",
    "job_columns",
    "job_layers",
    "default_output_dir",
    "RESULT_FILES",
    "JOURNAL",
    "DONE",
    "FAILED",
    "GATES",
]

#: A job's status tokens.
DONE, FAILED = "done", "failed"
#: The audit's gate, in the verdicts' own tokens: every row meets its claim, some row falls short, none
#: falls short but some is undecided; ``none`` when the plan states no claim.
GATES = ("meets", "falls-short", "undecided", "none")
#: The journal's file name in the results folder.
JOURNAL = "journal.jsonl"
#: The results files, by kind.
RESULT_FILES = {"csv": "results.csv", "json": "results.json", "gpkg": "results.gpkg",
                "manifest": "manifest.json", "report": "report.html"}
#: Journal format version (its header's ``journal``).
JOURNAL_VERSION = 1
#: The roles of a job's positionals, by kind; an input after them is the density.
ROLES = {"area": ("file",), "overlap": ("zones", "other"), "coverage": ("regions", "zones"),
         "integrate": ("regions",)}
#: Verdict tokens (areamc.sequential) as the claim summary counts them.
_MEETS, _SHORT, _UNDECIDED = "meets", "falls-short", "undecided"
#: Seconds allowed to reach a Dask scheduler.
CONNECT_TIMEOUT_S = 10
_SCHEDULER = re.compile(r"^tcp://[^\s/:]+(:\d+)?/?$")


# ----------------------------------------------------------------------------------- records


@dataclass(frozen=True)
class ClaimSummary:
    """How the rows of one job fared against its claim at one k, by one measure.

    Each row is judged on its own at `confidence` (a confidence sequence per row,
    :mod:`areamc.sequential`), not jointly: `met` rows meet the claim, `short` fall short,
    `undecided` were still undecided when the points ran out.  `measure` is ``share`` (the
    covered share of the region's area) or ``population_share`` (of its population).  No CRS.
    """

    job: str
    measure: str
    k: int
    claim: float
    confidence: float
    met: int
    short: int
    undecided: int
    short_ids: tuple[str, ...] = ()
    undecided_ids: tuple[str, ...] = ()

    def to_dict(self) -> dict:
        return {"job": self.job, "measure": self.measure, "k": self.k, "claim": self.claim,
                "confidence": self.confidence, "met": self.met, "short": self.short, "undecided": self.undecided,
                "short_ids": list(self.short_ids), "undecided_ids": list(self.undecided_ids)}


@dataclass(frozen=True)
class JobInput:
    """An input a job reads: its `role` (``file``, ``zones``, ``other``, ``regions``, ``density``), the
    plan's `name` for it, its absolute `path` and `layer` (an expression density has neither)."""

    role: str
    name: str
    path: str
    layer: str | None = None


@dataclass(frozen=True)
class JobResult:
    """One job of an audit.

    Attributes
    ----------
    name, kind : str
        The job's name and command (``area``, ``overlap``, ``coverage``, ``integrate``).
    status : str
        ``done`` or ``failed``.
    seconds : float or None
        Wall time of the job.
    units : str
        The job's ``--units``: the area unit of its results files (integrate: mean densities per it).
    rows : tuple of dict
        The rows as the command hands them to its writers: areas in m² of the job's plane.
    metadata : dict
        The command's metadata (command line, plane, confidence, seed as a string, inputs with
        their SHA-256, versions, caution); overlap's ``multiplicity`` is in `units`, as the command writes it.
    trace : tuple of dict
        Area jobs with the uniform sampler: each feature's running estimate every ``trace-every``
        points (areas m²); else empty.
    profile : tuple of dict
        Overlap jobs: the multiplicity rows (areas m²); else empty.
    claims : tuple of ClaimSummary
        Coverage jobs with a claim: one per measure and k.
    argv : tuple of str
        The job's command line.
    inputs : tuple of JobInput
    columns : tuple of str
        The fields of the command's table columns for this job (see :func:`job_columns`).
    types : dict
        Each row field's type (``str``, ``int``, ``float``, ``bool``).
    message : str or None
        Why the job failed (one line), else None.
    exit_status : int
        The command's own status (coverage with a claim: 1 short, 3 undecided), else 0.
    warnings : tuple of str
        The job's warnings, as the command line prints them.
    """

    name: str
    kind: str
    status: str
    seconds: float | None = None
    units: str = "km2"
    rows: tuple = ()
    metadata: Mapping = field(default_factory=dict)
    trace: tuple = ()
    profile: tuple = ()
    claims: tuple = ()
    argv: tuple = ()
    inputs: tuple = ()
    columns: tuple = ()
    types: Mapping = field(default_factory=dict)
    message: str | None = None
    exit_status: int = 0
    warnings: tuple = ()
    features: Mapping | None = field(default=None, repr=False, compare=False)


@dataclass(frozen=True)
class AuditResult:
    """A finished audit: the plan, each job's result in the plan's order, the claims and the gate.

    `gate` is ``meets`` (every row meets its claim), ``falls-short`` (some row falls short),
    ``undecided`` (none falls short, some is undecided) or ``none`` (the plan states no claim).  `files` maps ``csv``,
    ``json``, ``gpkg``, ``manifest``, ``report`` to the absolute paths written (``gpkg`` only
    when some job finished).  Times are ISO 8601 in UTC.
    """

    plan: object
    out_dir: str
    jobs: tuple[JobResult, ...]
    claims: tuple[ClaimSummary, ...]
    gate: str
    started: str
    finished: str
    scheduler: str | None = None
    files: Mapping = field(default_factory=dict)

    @property
    def failed(self) -> tuple[JobResult, ...]:
        """The jobs that failed."""
        return tuple(j for j in self.jobs if j.status != DONE)


# ------------------------------------------------------------------------ one job, anywhere


def _module(kind: str):
    from .cli import area, coverage, integrate, overlap

    return {"area": area, "overlap": overlap, "coverage": coverage, "integrate": integrate}[kind]


def _plain(value):
    """A JSON default: numpy scalars as Python numbers, other objects as text."""
    item = getattr(value, "item", None)
    if callable(item):
        try:
            return item()
        except (TypeError, ValueError):
            pass
    if isinstance(value, (set, frozenset)):
        return sorted(value, key=str)
    if isinstance(value, bytes):
        return value.hex()
    return str(value)


def _dumps(document) -> str:
    """One line of JSON; floats exactly (``repr``), NaN and infinities as JSON's extensions."""
    return json.dumps(document, default=_plain, separators=(",", ":"), ensure_ascii=False)


def run_job(argv: Sequence[str], *, quiet: bool = True, keep_trace: bool = True) -> str:
    """Run one job's command line and return its payload as one line of JSON.

    This is the function a Dask worker runs (top level, so it pickles by reference); the local
    run calls it too.  `argv` is a :attr:`~areamc.plan.PlanJob.argv`: the command and its
    options, with absolute paths, no output option.  With `quiet` false the command shows its
    own progress bar (on a terminal).  `keep_trace`: an area job with the uniform sampler keeps
    its running estimates every ``--trace-every`` points (results unchanged).

    The payload holds ``rows`` and ``metadata`` (areas in m²), ``trace``, ``profile``,
    ``columns``, ``types``, ``status`` (the command's exit status), ``warnings`` (each as the
    command line prints it), ``seconds``, and ``features``: ``wkb`` (hex, one per row, in the
    input's CRS, ``crs`` as WKT), ``layer`` and ``attributes`` (each input whose attributes the
    features carry: ``index_field``, ``suffix``, ``fields``, ``indices``, ``properties``).

    Raises whatever the command raises (an :class:`~areamc.errors.AreamcError` for bad input).
    """
    import shapely

    from .cli import build_parser
    from .cli.common import describe

    started = time.perf_counter()
    args = build_parser().parse_args(list(argv))
    args.argv = ["areamc", *argv]
    args.quiet = quiet
    if multiprocessing.current_process().daemon:  # a Dask worker: no pool of its own; results are the same
        args.workers = 1
    module = _module(args.command)
    options = {}
    if args.command == "area" and keep_trace and args.sampler == "uniform":
        options["trace"] = True
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        outcome = module.compute(args, features=True, **options)
    said = [describe(w.message) for w in caught
            if issubclass(w.category, AreamcWarning) and not issubclass(w.category, AreamcNotice)]
    report = outcome.report
    trace = [t.to_dict() for t in report.trace_rows()] if options.get("trace") else []
    profile = [m.to_dict() for m in getattr(report, "multiplicity", ())]
    geoms, crs, layer, *more = outcome.features
    attributes = []
    for spec in (more[0] if more else ()):
        source = spec.layer
        attributes.append({"index_field": spec.index_field, "suffix": spec.suffix,
                           "fields": [list(f) for f in (getattr(source, "fields", ()) or ())],
                           "indices": list(source.indices), "properties": [dict(p) for p in source.properties]})
    from .cli.common import report_types

    payload = {
        "rows": outcome.rows,
        "metadata": outcome.metadata,
        "trace": trace,
        "profile": profile,
        "columns": [c.field for c in (outcome.columns or outcome.screen.columns)],
        "types": report_types(report),
        "status": outcome.status,
        "warnings": [" ".join(text.split()) for text in said],
        "features": {"wkb": [None if g is None else shapely.to_wkb(g, hex=True) for g in (() if geoms is None else geoms)],
                     "crs": crs.to_wkt(), "layer": layer, "attributes": attributes},
        "seconds": time.perf_counter() - started,
    }
    return _dumps(payload)


# ----------------------------------------------------------------------------- results of jobs


def _claims(name: str, rows: Sequence[dict]) -> tuple[ClaimSummary, ...]:
    out = []
    for measure, key in (("share", "verdict"), ("population_share", "population_verdict")):
        judged = [r for r in rows if r.get(key) is not None]
        for k in sorted({r["k"] for r in judged}):
            at_k = [r for r in judged if r["k"] == k]
            ids = {token: tuple(str(r["id"]) for r in at_k if r[key] == token) for token in (_MEETS, _SHORT, _UNDECIDED)}
            out.append(ClaimSummary(name, measure, int(k), float(at_k[0].get("claim")),
                                    float(at_k[0].get("confidence", 0) or 0), len(ids[_MEETS]), len(ids[_SHORT]),
                                    len(ids[_UNDECIDED]), ids[_SHORT], ids[_UNDECIDED]))
    return tuple(out)


def _job_inputs(plan, job) -> tuple[JobInput, ...]:
    roles = list(ROLES[job.kind])
    if job.kind == "overlap" and len(job.inputs) < 2:
        roles = roles[:1]
    out = []
    for n, name in enumerate(job.inputs):
        role = roles[n] if n < len(roles) else "density"
        spec = plan.inputs.get(name, {})
        out.append(JobInput(role, name, str(spec.get("path", "")), spec.get("layer")))
    return tuple(out)


def _units(argv: Sequence[str]) -> str:
    from .cli.common import DEFAULT_UNITS

    units = DEFAULT_UNITS
    for n, word in enumerate(argv[:-1]):
        if word == "--units":
            units = argv[n + 1]
        elif word.startswith("--units="):
            units = word.split("=", 1)[1]
    return units


def _result(plan, job, payload: dict | None, message: str | None = None) -> JobResult:
    base = dict(name=job.name, kind=job.kind, argv=tuple(job.argv), inputs=_job_inputs(plan, job),
                units=_units(job.argv))
    if payload is None:
        return JobResult(status=FAILED, message=message, **base)
    rows = tuple(payload["rows"])
    metadata = dict(payload["metadata"])
    confidence = metadata.get("confidence")
    claims = _claims(job.name, [{**r, "confidence": confidence} for r in rows]) if job.kind == "coverage" else ()
    return JobResult(status=DONE, seconds=payload.get("seconds"), rows=rows, metadata=metadata,
                     trace=tuple(payload.get("trace", ())), profile=tuple(payload.get("profile", ())),
                     claims=claims, columns=tuple(payload.get("columns", ())), types=dict(payload.get("types", {})),
                     exit_status=int(payload.get("status", 0)), warnings=tuple(payload.get("warnings", ())),
                     features=payload.get("features"), **base)


def job_columns(job: JobResult) -> tuple[tuple, tuple]:
    """``(columns, fields)``: the :class:`~areamc.output.Column` list of the job's table, as the
    command shows it, and every field of its rows with areas (and per-area densities) marked, for
    unit conversion (areas m² in, the job's `units` out)."""
    from .output import Column

    module = _module(job.kind)
    known = {}
    for column in (*getattr(module, "WIDE_COLUMNS", ()), *module.COLUMNS):
        known[column.field] = column
    columns = tuple(known.get(name) or Column(name) for name in job.columns)
    return columns, tuple(module.SCREEN.fields)


def job_layers(job: JobResult) -> tuple:
    """The projected layers (plane metres; ``.lonlat`` degrees) the job ran on, read again from its
    inputs exactly as the command read them (same options, the same circles round facility points,
    the same plane): coverage ``(regions, zones[, blocks])``, overlap ``(zones[, other])``, area
    ``(layer,)``, integrate ``(regions[, blocks])``.

    Raises :class:`~areamc.errors.AreamcError` when an input cannot be read any more.
    """
    from .cli import build_parser

    args = build_parser().parse_args(list(job.argv))
    return tuple(_module(job.kind).read_inputs(args)[-1])


# ------------------------------------------------------------------------- the results folder


def default_output_dir(plan_path: str) -> str:
    """The results folder of a plan: beside it, named after it (``vale_audit.toml`` ->
    ``vale_audit-results``)."""
    folder, name = os.path.split(os.path.abspath(plan_path))
    return os.path.join(folder, os.path.splitext(name)[0] + "-results")


def _our_files(folder: str) -> list[str]:
    return [os.path.join(folder, name) for name in (*RESULT_FILES.values(), JOURNAL)]


def _check_folder(output_dir: str, resume: bool, overwrite: bool) -> None:
    """Refuse, before any work, a results folder that cannot be used as asked."""
    if resume and overwrite:
        raise OptionError("{resume} and {overwrite} exclude each other: {resume} finishes the audit the folder "
                          "holds, {overwrite} starts afresh", params=("resume", "overwrite"))
    if os.path.lexists(output_dir) and not os.path.isdir(output_dir):
        raise OptionError(f"{{param}} {output_dir}: exists and is not a folder", param="output_dir")
    parent = os.path.dirname(os.path.abspath(output_dir))
    if not os.path.isdir(parent):
        raise OptionError(f"{{param}} {output_dir}: its folder {parent} does not exist", param="output_dir")
    if os.path.isdir(output_dir):
        if not os.access(output_dir, os.W_OK | os.X_OK):
            raise OptionError(f"{{param}} {output_dir}: the folder is not writable", param="output_dir")
        if os.listdir(output_dir) and not (resume or overwrite):
            raise OptionError(f"{{output_dir}} {output_dir}: the results folder exists; give {{resume}} to finish "
                              "the audit it holds, or {overwrite} to start afresh",
                              params=("output_dir", "resume", "overwrite"))
    elif not os.access(parent, os.W_OK | os.X_OK):
        raise OptionError(f"{{param}} {output_dir}: cannot create it, {parent} is not writable", param="output_dir")


def _read_journal(path: str, plan) -> tuple[dict | None, dict[str, dict]]:
    """The journal's header and the payload of each finished job (by name), skipping a last line cut
    short by a crash and any job whose command line differs from the plan's."""
    if not os.path.exists(path):
        return None, {}
    with open(path, encoding="utf-8") as handle:
        lines = handle.read().split("\n")
    header, done = None, {}
    argv_of = {job.name: list(job.argv) for job in plan.jobs}
    for n, line in enumerate(lines):
        if not line.strip():
            continue
        try:
            entry = json.loads(line)
        except ValueError:
            if any(rest.strip() for rest in lines[n + 1:]):
                raise OptionError(f"{{resume}}: {path}:{n + 1}: the journal is damaged; give {{overwrite}} to "
                                  "start afresh", params=("resume", "overwrite")) from None
            break  # the last line, cut short by a crash: that job runs again
        if header is None:
            header = entry
            if header.get("plan_sha256") != plan.sha256:
                raise OptionError(f"{{resume}}: {path} was written for another version of the plan (its SHA-256 "
                                  "differs); give {overwrite} to start afresh", params=("resume", "overwrite"))
            continue
        name = entry.get("job")
        if name in argv_of and entry.get("argv") == argv_of[name] and entry.get("status") == DONE:
            done[name] = entry["payload"]
    return header, done


class _Journal:
    """The journal: appended one line per finished job, each line flushed and fsynced."""

    def __init__(self, path: str, header: dict, fresh: bool) -> None:
        self.path = path
        if not fresh:
            with open(path, "rb+") as handle:  # drop a last line cut short by a crash
                data = handle.read()
                if data and not data.endswith(b"\n"):
                    handle.truncate(data.rfind(b"\n") + 1)
        self._handle = open(path, "w" if fresh else "a", encoding="utf-8")
        if fresh:
            self._write(header)
        self._dir_sync()

    def _write(self, entry: dict) -> None:
        self._handle.write(_dumps(entry) + "\n")
        self._handle.flush()
        os.fsync(self._handle.fileno())

    def _dir_sync(self) -> None:
        try:
            fd = os.open(os.path.dirname(self.path), os.O_RDONLY)
        except OSError:
            return
        try:
            os.fsync(fd)
        except OSError:
            pass
        finally:
            os.close(fd)

    def done(self, job, payload_text: str) -> None:
        self._handle.write('{"job":' + json.dumps(job.name) + ',"status":"done","argv":'
                           + json.dumps(list(job.argv)) + ',"payload":' + payload_text + "}\n")
        self._handle.flush()
        os.fsync(self._handle.fileno())

    def close(self) -> None:
        """Close the journal (again: no effect)."""
        self._handle.close()


# ------------------------------------------------------------------------------- progress


class _Progress:
    """The audit's progress: on a terminal an overall bar (and each job's own bar, drawn by its
    command); elsewhere one line per job on stderr; nothing with `quiet`."""

    def __init__(self, total: int, quiet: bool, log: Callable[[str], None] | None = None) -> None:
        from .cli.progress import JobBar

        self.total = total
        self.quiet = quiet
        self.terminal = sys.stderr.isatty() and not quiet
        self._bar = JobBar(quiet) if self.terminal else None
        self._log = log
        self.finished = 0

    def start(self, done_before: int) -> None:
        self.finished = done_before
        if self._bar is not None:
            self._bar(self.finished, self.total, "job", f"{done_before} done before" if done_before else "")

    def job(self, result: JobResult, skipped: bool = False) -> None:
        self.finished += 1
        what = ("done before (journal)" if skipped else
                f"{result.status} in {result.seconds:.1f} s" if result.seconds is not None else result.status)
        if self._bar is not None:
            self._bar(self.finished, self.total, "job", f"{result.name}: {what}")
        elif not self.quiet:
            line = f"areamc: audit: job {self.finished}/{self.total} {result.name} ({result.kind}) {what}"
            (self._log or (lambda text: print(text, file=sys.stderr, flush=True)))(line)

    def writing(self) -> None:
        """Say that the results files and the report are being written (on the bar only)."""
        if self._bar is not None:
            self._bar(self.finished, self.total, "job", "writing the results and report.html")

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()
            self._bar = None


# ----------------------------------------------------------------------------------- run


def _connect(scheduler: str):
    if not _SCHEDULER.match(scheduler):
        raise OptionError(f"{{param}} {scheduler}: give the scheduler's address as tcp://HOST:PORT", param="scheduler")
    try:
        from distributed import Client
    except ImportError:
        raise OptionError("{param}: needs Dask distributed, which is not installed: pip install 'areamc[dask]'",
                          param="scheduler") from None
    import socket

    host, _, port = scheduler[len("tcp://"):].rstrip("/").rpartition(":")
    try:  # a quick look first: the client would retry a refused connection until its timeout
        socket.create_connection((host or port, int(port) if host else 8786), timeout=CONNECT_TIMEOUT_S).close()
    except (OSError, ValueError) as err:
        reason = err.strerror if isinstance(err, OSError) and err.strerror else str(err) or type(err).__name__
        raise OptionError(f"{{param}} {scheduler}: cannot reach the scheduler: {reason}", param="scheduler") from None
    try:
        return Client(scheduler, timeout=CONNECT_TIMEOUT_S, set_as_default=False)
    except (OSError, TimeoutError) as err:
        reason = " ".join(str(err).split()) or type(err).__name__
        raise OptionError(f"{{param}} {scheduler}: cannot reach the scheduler: {reason}", param="scheduler") from None


def _run_local(pending, journal, progress, quiet, on_result):
    for job in pending:
        try:
            text = run_job(job.argv, quiet=quiet or not progress.terminal)
        except (AreamcError, OSError) as err:
            on_result(job, None, _message(err))
            continue
        journal.done(job, text)
        on_result(job, json.loads(text), None)


def _run_dask(client, pending, journal, on_result):
    from distributed import as_completed

    futures = {client.submit(run_job, tuple(job.argv), pure=False, key=f"areamc-audit-{job.name}-{os.getpid()}-"
                             f"{time.time_ns()}"): job for job in pending}
    for future in as_completed(list(futures), loop=client.loop):
        job = futures[future]
        try:
            text = future.result()
        except (AreamcError, OSError) as err:
            on_result(job, None, _message(err))
            continue
        journal.done(job, text)
        on_result(job, json.loads(text), None)


def _message(err: BaseException) -> str:
    from .cli.common import describe

    return " ".join((describe(err) if isinstance(err, AreamcError) else
                     f"{err.filename + ': ' if getattr(err, 'filename', None) else ''}{err.strerror or err}").split())


def run_audit(plan, output_dir: str | None = None, *, resume: bool = False, overwrite: bool = False,
              scheduler: str | None = None, quiet: bool = False, command: str | None = None,
              log: Callable[[str], None] | None = None) -> AuditResult:
    """Run every job of `plan` (an :class:`areamc.plan.Plan`) and write the results folder.

    Parameters
    ----------
    plan : areamc.plan.Plan
        A checked plan (:func:`areamc.plan.check_plan`).
    output_dir : str, optional
        The results folder (default :func:`default_output_dir`).  It is created if missing (its
        parent must exist); an existing folder that is not empty is refused unless `resume` or
        `overwrite`.
    resume : bool
        Skip the jobs the folder's journal holds as finished (for the same plan, by SHA-256, and the
        same command line), run the others, and write every results file as an uninterrupted run
        would have.
    overwrite : bool
        Start afresh in an existing folder: the audit's own files there (results, manifest, report,
        journal) are removed first; other files are left alone.
    scheduler : str, optional
        ``tcp://HOST:PORT`` of a running Dask distributed scheduler to submit the jobs to.
    quiet : bool
        No progress (bars or lines).
    command : str, optional
        The command line to record in the manifest.
    log : callable, optional
        Where progress lines go when stderr is not a terminal (default: stderr).

    Returns
    -------
    AuditResult
        Failed jobs (bad input found only while running) have status ``failed`` and a message; the
        other jobs' results are written all the same, and a ``resume`` runs the failed ones again.

    Raises
    ------
    OptionError
        For a results folder that cannot be used (parameter ``output_dir``), `resume` with
        `overwrite`, a damaged journal or one of another plan (``resume``), a scheduler that
        cannot be reached (``scheduler``): all before any job runs.
    """
    output_dir = os.path.abspath(output_dir or default_output_dir(plan.path))
    _check_folder(output_dir, resume, overwrite)
    journal_path = os.path.join(output_dir, JOURNAL)
    header, done = _read_journal(journal_path, plan) if resume else (None, {})
    client = _connect(scheduler) if scheduler else None
    try:
        os.makedirs(output_dir, exist_ok=True)
        if overwrite:
            for path in _our_files(output_dir):
                if os.path.isfile(path):
                    os.unlink(path)
        fresh = header is None
        if fresh:
            header = {"journal": JOURNAL_VERSION, "tool": "areamc", "version": __version__, "plan": plan.path,
                      "plan_sha256": plan.sha256, "started": utc_now()}
            done = {}
        journal = _Journal(journal_path, header, fresh)
        results: dict[str, JobResult] = {}
        progress = _Progress(len(plan.jobs), quiet, log)
        progress.start(len(done))
        try:
            for job in plan.jobs:
                if job.name in done:
                    results[job.name] = _result(plan, job, done[job.name])

            def on_result(job, payload, message):
                result = _result(plan, job, payload, message)
                results[job.name] = result
                for text in result.warnings:  # as the job's command said them (in this process or a worker)
                    warnings.warn(AreamcWarning(f"job {job.name}: {text}"), stacklevel=2)
                progress.job(result)

            pending = [job for job in plan.jobs if job.name not in done]
            if client is not None:
                _run_dask(client, pending, journal, on_result)
            else:
                _run_local(pending, journal, progress, quiet, on_result)
            journal.close()
            progress.writing()
            return _finish(plan, output_dir, results, header, scheduler, command)
        finally:
            journal.close()
            progress.close()
    finally:
        if client is not None:
            client.close()


def _finish(plan, output_dir, results, header, scheduler, command) -> AuditResult:
    """The audit's result from each job's, and its results files written."""
    from .report import write_report

    jobs = tuple(results[job.name] for job in plan.jobs)
    claims = tuple(c for job in jobs for c in job.claims)
    gate = ("none" if not claims else _SHORT if any(c.short for c in claims)
            else _UNDECIDED if any(c.undecided for c in claims) else _MEETS)
    files = {kind: os.path.join(output_dir, name) for kind, name in RESULT_FILES.items()}
    if not any(job.status == DONE and job.features for job in jobs):
        files.pop("gpkg")
    audit = AuditResult(plan, output_dir, jobs, claims, gate, header["started"], utc_now(), scheduler, files)
    _write_results(audit, command, write_report)
    return audit


def _table_rows(audit: AuditResult) -> list[dict]:
    """Every finished job's rows, each with ``job`` and ``units`` first, areas in the job's units."""
    from .output import convert_rows

    out = []
    for job in audit.jobs:
        if job.status != DONE:
            continue
        _, fields = job_columns(job)
        for row in convert_rows(job.rows, fields, job.units):
            out.append({"job": job.name, "units": job.units, **row})
    return out


def _union(rows: Iterable[dict]) -> list[str]:
    names: dict[str, None] = {}
    for row in rows:
        names.update(dict.fromkeys(row))
    return list(names)


def _job_entry(job: JobResult) -> dict:
    """A job's entry in the manifest."""
    plane = job.metadata.get("plane") if job.metadata else None
    return {"job": job.name, "kind": job.kind, "status": job.status, "seconds": job.seconds,
            "seed": (job.metadata or {}).get("seed", _argv_value(job.argv, "--seed")),
            "plane": plane.get("crs") if isinstance(plane, dict) else plane,
            "units": job.units, "command": "areamc " + " ".join(job.argv), "exit_status": job.exit_status,
            "warnings": list(job.warnings), "message": job.message}


def _argv_value(argv: Sequence[str], flag: str) -> str | None:
    for n, word in enumerate(argv[:-1]):
        if word == flag:
            return argv[n + 1]
    return None


def _input_entries(plan) -> list[dict]:
    out = []
    for name, spec in plan.inputs.items():
        path = str(spec.get("path", ""))
        files = file_digests(path, spec.get("layer")) if path and os.path.exists(path) else []
        out.append({"name": name, "path": path, "layer": spec.get("layer"), "files": files})
    return out


def _manifest(audit: AuditResult, command: str | None) -> dict:
    plan = audit.plan
    settings = dict(plan.settings)
    return {
        "tool": "areamc",
        "version": __version__,
        "command": command,
        "plan": {"path": plan.path, "sha256": plan.sha256},
        "inputs": _input_entries(plan),
        "versions": dict(versions()),
        "seed": None if settings.get("seed") is None else str(settings["seed"]),
        "plane": settings.get("plane-crs") or "chosen from each job's data (see each job's plane)",
        "started": audit.started,
        "finished": audit.finished,
        "scheduler": audit.scheduler,
        "jobs": [_job_entry(job) for job in audit.jobs],
        "claims": [c.to_dict() for c in audit.claims],
        "gate": audit.gate,
        "files": {kind: os.path.basename(path) for kind, path in audit.files.items()},
    }


def _attributes(spec: dict):
    from .vector import Attributes

    return Attributes(_AttributeSource(tuple(tuple(f) for f in spec["fields"]), tuple(spec["indices"]),
                                       tuple(spec["properties"])), spec["index_field"], spec["suffix"])


@dataclass(frozen=True)
class _AttributeSource:
    """An input's attributes as the journal holds them (what :class:`areamc.vector.Attributes` reads)."""

    fields: tuple
    indices: tuple
    properties: tuple


def _write_gpkg(path: str, audit: AuditResult, batch: OutputBatch) -> None:
    import pyproj
    import shapely

    from .cli.common import write_feature_rows

    jobs = [job for job in audit.jobs if job.status == DONE and job.features]
    if not jobs:
        return
    with batch.staging(path, ".gpkg", create=False) as tmp:
        for job in jobs:
            features = job.features
            geoms = [None if g is None else shapely.from_wkb(g) for g in features["wkb"]]
            spec = (geoms, pyproj.CRS.from_wkt(features["crs"]), job.name,
                    [_attributes(a) for a in features["attributes"]])
            _, fields = job_columns(job)
            write_feature_rows(tmp, list(job.rows), fields, job.units, dict(job.metadata), spec, types=job.types,
                               staged=True)


def _write_results(audit: AuditResult, command: str | None, write_report) -> None:
    rows = _table_rows(audit)
    names = _union(rows)
    from .output import Column

    with OutputBatch() as batch:
        filled = [{name: row.get(name) for name in names} for row in rows]
        csv_text = render(filled, [Column(n) for n in names], fmt="csv", units="m2", metadata={})
        write_text(csv_text, audit.files["csv"], batch=batch)
        document = {"tool": "areamc", "version": __version__, "plan": audit.plan.path,
                    "jobs": [{"job": j.name, "kind": j.kind, "status": j.status, "units": j.units,
                              "metadata": j.metadata, "message": j.message} for j in audit.jobs],
                    "results": rows}
        write_json(json_safe(document), audit.files["json"], batch=batch)
        if "gpkg" in audit.files:
            _write_gpkg(audit.files["gpkg"], audit, batch)
        write_json(_manifest(audit, command), audit.files["manifest"], batch=batch)
        write_report(audit.files["report"], audit, batch=batch)
