"""``areamc audit PLAN.toml``: run a plan's jobs and write a results folder (docs/audit.md)."""

from __future__ import annotations

import os
import sys

from .coverage import EXIT_UNDECIDED

DESCRIPTION = """\
Run every job of the TOML plan PLAN (areas, overlaps, coverage shares and totals of named inputs,
with claims) and write its results folder: results.csv and results.json (every job's rows with the
job's name and units), results.gpkg (a layer per job), manifest.json (versions, SHA-256 of the
plan and of every input, seed, times, each job's status) and report.html. A journal in the folder
lets --resume finish an interrupted audit with the results of an uninterrupted one. --check only
checks the plan: every error is listed with its line."""


def add_parser(sub) -> None:
    p = sub.add_parser("audit", help="run a plan of jobs and write a results folder with a report",
                       description=DESCRIPTION)
    p.add_argument("plan", metavar="PLAN", help="the plan: a TOML file of settings, inputs and jobs")
    p.add_argument("--check", action="store_true",
                   help="check the plan and its input files without running any job; every error is listed "
                   "with its line")
    p.add_argument("--output-dir", metavar="DIR",
                   help="the results folder (default: beside the plan, named after it: PLAN-results)")
    p.add_argument("--resume", action="store_true",
                   help="finish the audit the results folder holds: jobs its journal records as done are "
                   "not run again")
    p.add_argument("--overwrite", action="store_true",
                   help="start afresh in an existing results folder (the audit's own files there are replaced)")
    p.add_argument("--scheduler", metavar="tcp://HOST:PORT",
                   help="run the jobs on this Dask distributed cluster (pip install 'areamc[dask]'); every "
                   "worker must see the input files under the same paths")
    p.add_argument("--fail-on-shortfall", action="store_true",
                   help=f"exit status 1 when any row of any job falls short of its claim, or {EXIT_UNDECIDED} "
                   "when none falls short but some verdict is still undecided")
    p.add_argument("--quiet", "-q", action="store_true",
                   help="no progress (bars on the terminal, one line per job elsewhere) and no notes; "
                   "warnings are still shown")
    p.add_argument("--verbose", "-v", action="store_true", help="show the traceback of an error")
    p.set_defaults(run=run)


def run(args) -> int:
    from ..audit import FAILED, run_audit
    from ..sequential import FALLS_SHORT, UNDECIDED
    from ..plan import PlanError, check_plan

    try:
        plan = check_plan(args.plan)
    except PlanError as err:
        if args.verbose:
            raise
        for line in err.lines:  # the one exception to the one-line rule: a plan's errors are listed together
            print(f"areamc: error: {' '.join(line.split())}", file=sys.stderr)
        return err.exit_status
    if args.check:
        inputs = len(plan.inputs)
        print(f"{plan.path}: {len(plan.jobs)} job(s) over {inputs} input(s); no error found")
        return 0
    audit = run_audit(plan, args.output_dir, resume=args.resume, overwrite=args.overwrite,
                      scheduler=args.scheduler, quiet=args.quiet, command=" ".join(getattr(args, "argv", ())))
    failed = [job for job in audit.jobs if job.status == FAILED]
    shown = os.path.relpath(audit.out_dir) if not audit.out_dir.startswith("..") else audit.out_dir
    if shown.startswith(".."):
        shown = audit.out_dir
    print(f"{len(audit.jobs) - len(failed)} of {len(audit.jobs)} job(s) done; results in {shown}")
    print(f"claims: {_claims_line(audit)}")
    for job in failed:
        print(f"areamc: error: job {job.name} ({job.kind}) failed: {job.message}; the other jobs' results are "
              "written, and --resume runs it again", file=sys.stderr)
    if failed:
        return 2
    if args.fail_on_shortfall:
        if audit.gate == FALLS_SHORT:
            return 1
        if audit.gate == UNDECIDED:
            return EXIT_UNDECIDED
    return 0


def _claims_line(audit) -> str:
    """One line on the claims: how many rows meet, fall short, are undecided, over every job and k."""
    if not audit.claims:
        return "none stated in the plan"
    met = sum(c.met for c in audit.claims)
    short = sum(c.short for c in audit.claims)
    undecided = sum(c.undecided for c in audit.claims)
    return (f"{met} row(s) meet, {short} fall short, {undecided} undecided (each row judged on its own; "
            "report.html names them)")
