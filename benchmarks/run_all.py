"""Run every speed benchmark, print one table, and (with --write) put it in docs/performance.md.

Run:  .venv/bin/python benchmarks/run_all.py [--write] [--quick] [--only TEXT] [--json FILE] [--moonshot]

Each row comes from a benchmark module's ``run(quick=...)``, which times areamc and the fair exact baseline of ``baselines.py`` side by
side and returns a small record (``common.record``).  Rows for a feature
areamc does not have yet (a sampler not registered, a keyword a job does not
take) read "not available"; a benchmark that fails reads "failed" with the
error, and the others still run.  ``--write`` replaces the text between the
``<!-- benchmark-table:start -->`` and ``<!-- benchmark-table:end -->``
markers of docs/performance.md with the table (full mode only; the file is
replaced atomically).  ``--quick`` runs smaller sizes for a smoke run
(under a minute); ``--only`` keeps the rows whose name contains TEXT.
The moonshot (``moonshot.py``, tens of minutes) runs only with
``--moonshot`` or ``--only moonshot``; otherwise its row shows the figures
of its last full run, saved in ``benchmarks/moonshot_last.json`` and
labelled with their date and command.

The statistical scripts (claim_error_rate, flag_rate, tolerance_bias,
small_draws) back figures in docs/methods.md and are not timed here.
"""

from __future__ import annotations

import argparse
import datetime
import importlib
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
if str(HERE) not in sys.path:
    sys.path.insert(0, str(HERE))

from common import ROOT, print_record, record  # noqa: E402

DOC = ROOT / "docs" / "performance.md"
START = "<!-- benchmark-table:start -->"
END = "<!-- benchmark-table:end -->"
COMMAND = ".venv/bin/python benchmarks/run_all.py --write"

#: (module, function, keywords, issue 9 target letter): the table's rows, in order.
ROWS = [
    ("cell_classifier", "run", {}, "(a)"),
    ("stratified_points", "run", {}, "(b)"),
    ("population_overlay", "run", {}, "(c)"),
    ("population_overlay", "run", {"sampler": "stratified"}, "(c)"),
    ("multiplicity", "run", {}, "(c)"),
    ("multiplicity", "run", {"sampler": "stratified"}, "(c)"),
    ("memory_points", "run", {}, "(d)"),
    ("workers", "run", {}, "(e)"),
    ("workers_one_region", "run", {}, "(e)"),
    ("overlap_pairs", "run", {}, "item 6"),
    ("classify_zones", "run", {}, "item 1"),
    ("raster_total", "run", {}, ""),
    ("raster_exact", "run", {}, "item 4"),
    ("area_throughput", "run", {}, ""),
    ("transform_layer", "run", {}, "item 6"),
]
#: Rows run only when asked (``--moonshot``, or ``--only`` naming them): the moonshot takes tens of minutes.
#: Otherwise the table shows the figures of its last full run, saved with their date and command.
ON_REQUEST = [
    ("moonshot", "run", {}, ""),
]


def run_row(module: str, function: str, kwargs: dict, quick: bool) -> dict:
    """Run one benchmark and return its record; an error becomes a "failed" (or "not available") record."""
    name = f"{module}.{function}" + "".join(f" {v}" for v in kwargs.values())
    command = f".venv/bin/python benchmarks/{module}.py" + (" --quick" if quick else "")
    try:
        fn = getattr(importlib.import_module(module), function)
        return fn(quick=quick, **kwargs)
    except Exception as err:  # one benchmark's failure must not lose the others
        from areamc.errors import OptionError

        if isinstance(err, OptionError) and getattr(err, "param", None) in ("sampler", "workers"):
            return record(name, name, command, status=f"not available: {err}")
        traceback.print_exc()
        return record(name, name, command, status=f"failed: {type(err).__name__}: {' '.join(str(err).split())[:160]}")


def _cell(text) -> str:
    return str(text).replace("|", "\\|").replace("\n", " ")


def table(records: list[dict]) -> str:
    """The Markdown table of the records: benchmark, areamc, fair exact baseline, ratio, target, met?, command."""
    lines = ["| benchmark | areamc | fair exact baseline | ratio | target | met? | command |",
             "|---|---|---|---|---|---|---|"]
    for rec in records:
        head = f"**{rec['name']}** {rec.get('letter', '')}".rstrip() + f": {rec['what']}"
        if rec["status"] != "ok":
            lines.append(f"| {_cell(head)} | {_cell(rec['status'])} | — | — | {_cell(rec['target'] or '—')} | — "
                         f"| `{rec['command']}` |")
            continue
        mc = rec["areamc_text"]
        if rec["inside"] is not None and rec["half_width"] is not None:
            mc += f"; exact inside the interval: {'yes' if rec['inside'] else 'NO'}"
        ratio = "—"
        if rec["ratio"] is not None:
            ratio = f"{rec['ratio']:.2f} ({rec['ratio_of']}"
            ratio += f"; job only, without loading: {rec['job_ratio']:.2f})" if rec["job_ratio"] is not None else ")"
        met = {True: "yes", False: "**no**", None: "—"}[rec["met"]]
        lines.append(f"| {_cell(head)} | {_cell(mc)} | {_cell(rec['baseline_text'])} | {_cell(ratio)} "
                     f"| {_cell(rec['target'] or '—')} | {met} | `{rec['command']}` |")
    return "\n".join(lines)


def _revision() -> str:
    try:
        rev = subprocess.run(["git", "rev-parse", "--short", "HEAD"], cwd=ROOT, capture_output=True, text=True,
                             timeout=10).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--untracked-files=no"], cwd=ROOT,
                               capture_output=True, text=True, timeout=10).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return "unknown revision"
    return f"revision {rev}" + (" with uncommitted changes" if dirty else "") if rev else "unknown revision"


def block(records: list[dict], seconds: float, quick: bool) -> str:
    """The text put between the markers: a line saying how and when, then the table."""
    when = datetime.date.today().isoformat()
    machine = f"{platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}"
    mode = "quick mode (smaller sizes)" if quick else "full sizes"
    return (f"Measured {when} by `{COMMAND}` ({mode}; {_revision()}; {machine}; "
            f"whole run {seconds / 60:.1f} min). Ratios above 1 favour areamc. "
            "Times are wall-clock seconds on one core unless the row says otherwise, "
            "loading and projection included where the row says \"load\".\n\n" + table(records))


def replace_block(text: str, new: str) -> str:
    """`text` with everything between the start and end markers replaced by `new` (markers kept).

    Raises ValueError when the markers are missing, repeated or out of order.
    """
    if text.count(START) != 1 or text.count(END) != 1:
        raise ValueError(f"expected one {START} and one {END} marker")
    head, rest = text.split(START)
    if END not in rest:
        raise ValueError(f"{END} comes before {START}")
    _, tail = rest.split(END)
    return f"{head}{START}\n{new.strip()}\n{END}{tail}"


def write_doc(path: Path, new_block: str) -> None:
    """Replace the block in `path` atomically (a temporary file in the same folder, then os.replace)."""
    text = replace_block(path.read_text(encoding="utf-8"), new_block)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=".performance-", suffix=".md")
    try:
        with os.fdopen(fd, "w", encoding="utf-8") as out:
            out.write(text)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--write", action="store_true", help=f"rewrite the table in {DOC.relative_to(ROOT)}")
    parser.add_argument("--quick", action="store_true", help="smaller sizes, for a smoke run (cannot be written)")
    parser.add_argument("--only", metavar="TEXT", help="run only the rows whose module or sampler contains TEXT")
    parser.add_argument("--json", metavar="FILE", help="also write the records as JSON to FILE")
    parser.add_argument("--moonshot", action="store_true",
                        help="also run the moonshot (benchmarks/moonshot.py, tens of minutes); without it the table "
                             "shows its last saved run")
    args = parser.parse_args(argv)
    if args.write and (args.quick or args.only):
        parser.error("--write takes the full run: drop --quick and --only")
    if args.write:
        replace_block(DOC.read_text(encoding="utf-8"), "")  # fail on missing markers before an 8-minute run
    rows = [r for r in ROWS if not args.only or args.only in f"{r[0]}.{r[1]} {' '.join(map(str, r[2].values()))}"]
    # an on-request row runs with --moonshot, or when --only names it (not on any substring of its name)
    asked = [r for r in ON_REQUEST if args.moonshot or (args.only and r[0] in args.only)]
    rows += asked
    saved = [r for r in ON_REQUEST if r not in asked and not args.only]
    start = time.perf_counter()
    records = []
    for module, function, kwargs, letter in rows:
        print(f"\n=== {module}.{function} {kwargs or ''}".rstrip(), flush=True)
        row_start = time.perf_counter()
        rec = run_row(module, function, kwargs, args.quick)
        rec["letter"] = letter
        print_record(rec)
        print(f"  ({time.perf_counter() - row_start:.0f} s)", flush=True)
        records.append(rec)
    for module, _function, _kwargs, letter in saved:
        rec = importlib.import_module(module).saved_record()  # reads a small JSON file: no run
        rec["letter"] = letter
        print_record(rec)
        records.append(rec)
    seconds = time.perf_counter() - start
    text = block(records, seconds, args.quick)
    print("\n" + text)
    if args.json:
        Path(args.json).write_text(json.dumps(records, indent=2, default=str), encoding="utf-8")
    if args.write:
        write_doc(DOC, text)
        print(f"\nwrote the table to {DOC.relative_to(ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
