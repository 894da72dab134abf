"""Rerun every example of the documentation and check (or rewrite) the output the pages show.

``python docs/run_examples.py`` checks every page; ``--write`` rewrites the shown
outputs in place from a fresh run; ``--page README.md`` (repeatable) restricts the
run to some pages.  Exit status: 0 when every block is up to date (or was
rewritten), 1 when some block drifted (each is listed with its page, line and a
unified diff), 2 when some block cannot be checked: its command is refused or fails,
or its shown lines no longer fit the output.  Such a block is named and left as it
is; ``--write`` still rewrites the others.
The test suite runs the check (tests/test_tooling.py).

Two kinds of example, one mechanism:

* **Shell examples** (README.md, docs/output.md): a fenced block whose first line
  is ``$ areamc ...`` (continued over lines ending in ``\\``) shows that command's
  standard output below it; a block that shows output only is preceded by a marker
  line ``<!-- example: areamc ... -->`` naming its command.  Each command is run
  from the repository root as ``python -m areamc ...`` with this interpreter
  (``sys.executable``), COLUMNS=100, stdin, stdout and stderr not a terminal; only
  stdout is compared, and the command must exit 0.  A command of a sampling job
  (one whose parser takes ``--seed``) must give ``--seed``, or it is refused.
* **Python examples** (docs/api.md): every ```python block runs in order in one
  namespace, from the repository root; the ```text block right after one shows
  what it prints.

**Elided output.** A line ``...`` in a shown output stands for one or more lines
left out.  The shown lines form runs between the ``...`` lines; a block is up to
date when ``--write`` would leave it unchanged, and ``--write`` refills each run
with the same number of consecutive lines of the fresh output:

* the run before the first ``...`` (when the block does not start with one) from
  the top of the output, and the run after the last ``...`` (when the block does
  not end with one) from the bottom;
* any other run from the first later line whose first word is the first word of
  the run's first shown line (its row id: ``D04``, ``id``, ``claim:``), or from the
  first later line equal to that shown line when there is one.

Every ``...`` keeps its place and must still stand for at least one line, and each
refilled line must begin with the same word as the shown line it replaces (row ids
and headings stay in place).  Otherwise the output has changed shape and the block
is refused: delete its ``...`` lines, run ``--write``, and cut it again.  A block
without ``...`` shows the whole output.
"""

from __future__ import annotations

import argparse
import contextlib
import difflib
import io
import os
import re
import shlex
import subprocess
import sys
import traceback
import warnings
from dataclasses import dataclass
from typing import Callable

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

#: The pages with examples (paths from the repository root) and the kind of example each holds.
PAGES = {"README.md": "shell", "docs/output.md": "shell", "docs/api.md": "python"}

#: The line that stands for one or more omitted output lines.
ELISION = "..."

#: Environment of every shell example: a fixed width, and no terminal.
COLUMNS = "100"

_FENCE = re.compile(r"^```[^\n]*\n(.*?)^```[ \t]*$", re.S | re.M)
_MARKER = re.compile(r"<!--\s*example:\s*((?:(?!-->).)*?)\s*-->[ \t]*\n", re.S)
_PYTHON = re.compile(r"^```python\n(.*?)^```\n(?:\n```text\n(.*?)^```\n)?", re.S | re.M)
_SHELL_OPERATORS = {"|", "||", "&", "&&", ";", ">", ">>", "<", "2>", "2>&1"}


class ExampleError(Exception):
    """A block that cannot be checked: no ``--seed``, a failing command, shown lines that cannot be placed."""


@dataclass(frozen=True)
class Example:
    """One example of a page: where it is, what it runs and what the page shows for it."""

    page: str  # path from the repository root
    line: int  # 1-based line of the block's opening fence (the ```python fence for Python examples)
    kind: str  # "shell" or "python"
    source: str  # the command line (shell) or the code (python)
    shown: str | None  # the shown output, or None (a Python block with no ```text block after it)
    span: tuple[int, int] | None  # character span of `shown` in the page

    @property
    def where(self) -> str:
        return f"{self.page}:{self.line}"


@dataclass(frozen=True)
class Completed:
    """What a shell example printed."""

    status: int
    stdout: str
    stderr: str


@dataclass(frozen=True)
class Drift:
    """A block whose shown output differs from what the program prints now."""

    example: Example
    expected: str  # the block as --write would write it
    diff: str


Runner = Callable[[list[str]], Completed]


def _line_of(text: str, pos: int) -> int:
    return text.count("\n", 0, pos) + 1


def find_examples(page: str, text: str) -> list[Example]:
    """The examples of `page` (a key of :data:`PAGES`), in page order."""
    kind = PAGES[page]
    found = []
    if kind == "python":
        for match in _PYTHON.finditer(text):
            span = match.span(2) if match.group(2) is not None else None
            found.append(Example(page, _line_of(text, match.start()), "python", match.group(1), match.group(2), span))
        return found
    for match in _FENCE.finditer(text):
        body, start = match.group(1), match.start(1)
        line = _line_of(text, match.start())
        head = text[:match.start()]
        marker = _MARKER.fullmatch(head, max(head.rfind("<!--"), 0))
        if body.startswith("$ areamc "):
            lines = body.splitlines(keepends=True)
            n = 1
            while lines[n - 1].rstrip("\n").endswith("\\") and n < len(lines):
                n += 1
            words = [piece.rstrip("\n").removesuffix("\\").strip() for piece in lines[:n]]
            command = " ".join(words)[2:].strip()
            offset = sum(len(piece) for piece in lines[:n])
            found.append(Example(page, line, "shell", command, body[offset:], (start + offset, match.end(1))))
        elif marker is not None:
            command = " ".join(marker.group(1).split())
            if not command.startswith("areamc "):
                raise ExampleError(f"{page}:{line}: the example marker must name an areamc command, "
                                   f"not {command!r}")
            found.append(Example(page, line, "shell", command, body, (start, match.end(1))))
    return found


def command_args(example: Example) -> list[str]:
    """The arguments after ``areamc`` of a shell example, refusing shell syntax and unseeded sampling.

    A command whose parser has ``--seed`` (it samples) must give it, so that its output is
    reproducible; ``inspect`` samples nothing and needs none.
    """
    try:
        words = shlex.split(example.source)
    except ValueError as err:
        raise ExampleError(f"{example.where}: cannot read the command: {err}") from err
    if words[:1] != ["areamc"] or any(word in _SHELL_OPERATORS for word in words):
        raise ExampleError(f"{example.where}: only a plain `areamc ...` command can run, not {example.source!r}")
    args = words[1:]
    from areamc.cli import build_parser
    from areamc.cli.common import describe
    from areamc.errors import AreamcError

    try:
        with contextlib.redirect_stderr(io.StringIO()):
            parsed = build_parser().parse_args(args)
    except SystemExit:  # --help, --version, or a usage error reported the argparse way
        return args
    except AreamcError as err:
        raise ExampleError(f"{example.where}: areamc refuses the command line `{example.source}`: "
                           f"{' '.join(describe(err).split())}") from err
    except Exception as err:
        raise ExampleError(f"{example.where}: areamc's parser fails on `{example.source}`: "
                           f"{type(err).__name__}: {err}") from err
    if hasattr(parsed, "seed") and parsed.seed is None:
        raise ExampleError(f"{example.where}: `areamc {args[0]}` samples, so the example needs a fixed --seed")
    return args


def run_subprocess(args: list[str]) -> Completed:
    """Run ``python -m areamc ARGS`` from the repository root, with no terminal and COLUMNS=100."""
    done = subprocess.run([sys.executable, "-m", "areamc", *args], cwd=ROOT, env=dict(os.environ, COLUMNS=COLUMNS),
                          stdin=subprocess.DEVNULL, capture_output=True, text=True)
    return Completed(done.returncode, done.stdout, done.stderr)


def run_in_process(args: list[str]) -> Completed:
    """The same as :func:`run_subprocess`, through ``areamc.cli.main`` in this process (faster in tests).

    stdout and stderr go to in-memory buffers, which are no terminal, so no progress bar shows.
    """
    from areamc.cli import main

    out, err = io.StringIO(), io.StringIO()
    saved_cwd, saved_columns = os.getcwd(), os.environ.get("COLUMNS")
    os.chdir(ROOT)
    os.environ["COLUMNS"] = COLUMNS
    try:
        with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
            status = main(args)
    finally:
        os.chdir(saved_cwd)
        if saved_columns is None:
            del os.environ["COLUMNS"]
        else:
            os.environ["COLUMNS"] = saved_columns
    return Completed(int(status or 0), out.getvalue(), err.getvalue())


def run_python(examples: list[Example]) -> list[str]:
    """Execute Python examples in order in one namespace, from the repository root; what each printed.

    Line numbers in a traceback are the page's; an exception becomes an :class:`ExampleError`.
    """
    namespace: dict = {"__name__": "__doc_examples__"}
    printed = []
    cwd = os.getcwd()
    os.chdir(ROOT)
    try:
        for ex in examples:
            buffer = io.StringIO()
            code = compile("\n" * ex.line + ex.source, ex.page, "exec")  # the code starts on the line after the fence
            try:
                with contextlib.redirect_stdout(buffer), warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    exec(code, namespace)  # the page's own examples, not user input
            except Exception as err:
                lines = [f"{ex.page}:{frame.lineno}" for frame in traceback.extract_tb(err.__traceback__)
                         if frame.filename == ex.page]
                raise ExampleError(f"{ex.where}: the example raised {type(err).__name__}: {err}"
                                   + (f" (at {lines[-1]})" if lines else "")) from err
            printed.append(buffer.getvalue())
    finally:
        os.chdir(cwd)
    return printed


def fresh_outputs(examples: list[Example], runner: Runner = run_subprocess) -> list[str | ExampleError]:
    """What each example prints now, in order, or the error that stopped it.

    Python examples all run, in one namespace: an error in one stops the page (it is raised).
    A shell example that is refused or fails gets its error, and the others still run.
    """
    python = [ex for ex in examples if ex.kind == "python"]
    printed = iter(run_python(python))
    out: list[str | ExampleError] = []
    for ex in examples:
        if ex.kind == "python":
            out.append(next(printed))
            continue
        try:
            done = runner(command_args(ex))
        except ExampleError as err:
            out.append(err)
            continue
        if done.status != 0:
            out.append(ExampleError(f"{ex.where}: `{ex.source}` exited with status {done.status}: "
                                    f"{done.stderr.strip()[-2000:]}"))
        else:
            out.append(done.stdout)
    return out


def refill(shown: str, fresh: str, where: str = "block") -> str:
    """The block `shown` rewritten from the output `fresh`, keeping its elisions (the rule in the module docstring)."""
    lines = shown.splitlines()
    if ELISION not in lines:
        return fresh
    out_lines = fresh.splitlines()
    runs: list[list[str]] = [[]]
    for line in lines:
        if line == ELISION:
            runs.append([])
        else:
            runs[-1].append(line)
    # runs[0] precedes the first "...", runs[-1] follows the last; either may be empty.
    starts: list[int] = []
    floor = 0  # first output line a run may start at
    last = len(runs) - 1
    for i, run in enumerate(runs):
        if not run:
            starts.append(floor)
            floor += 1 if i < last else 0  # an empty run: the "..." beside it needs a line
            continue
        if i == 0:
            start = 0
        elif i == last:
            start = len(out_lines) - len(run)
        else:
            start = _anchor(run[0], out_lines, floor, where)
        if start < floor or start + len(run) > len(out_lines):
            raise ExampleError(f"{where}: the output has no room for its {len(run)} shown line(s) starting "
                               f"{run[0]!r} with '...' standing for at least one line each; edit the block")
        starts.append(start)
        floor = start + len(run) + (1 if i < last else 0)
    if not runs[-1] and floor > len(out_lines):
        raise ExampleError(f"{where}: nothing is left for the last '...' to stand for; edit the block")
    pieces: list[str] = []
    for i, (run, start) in enumerate(zip(runs, starts)):
        if i:
            pieces.append(ELISION)
        for old, new in zip(run, out_lines[start:start + len(run)]):
            if _first_word(old) != _first_word(new):
                raise ExampleError(f"{where}: the output changed shape: the shown line {old!r} would become "
                                   f"{new!r}; delete the block's '...' lines, run --write, and cut it again")
            pieces.append(new)
    return "\n".join(pieces) + "\n"


def _first_word(line: str) -> str:
    words = line.split()
    return words[0] if words else ""


def _anchor(first: str, out_lines: list[str], floor: int, where: str) -> int:
    """Where a middle run starts: the first line from `floor` equal to `first`, else the first with its first word."""
    if first in out_lines[floor:]:
        return out_lines.index(first, floor)
    word = _first_word(first)
    for n in range(floor, len(out_lines)):
        if _first_word(out_lines[n]) == word:
            return n
    raise ExampleError(f"{where}: no output line after the lines shown above it starts with {word!r} "
                       f"(shown: {first!r}); edit the block")


@dataclass(frozen=True)
class PageCheck:
    """One page checked: its examples, the drifted blocks, the blocks that could not be checked, and
    the page as --write writes it (drifted blocks rewritten; the others, and all prose, as they were)."""

    examples: list[Example]
    drifts: list[Drift]
    errors: list[ExampleError]
    text: str


def check_page(page: str, text: str, runner: Runner = run_subprocess) -> PageCheck:
    """Check one page's text (`page` is its key in :data:`PAGES`)."""
    examples = find_examples(page, text)
    outputs = fresh_outputs(examples, runner)
    drifts, errors, pieces, last = [], [], [], 0
    for ex, out in zip(examples, outputs):
        if ex.shown is None:
            continue
        try:
            if isinstance(out, ExampleError):
                raise out
            expected = refill(ex.shown, out, ex.where)
        except ExampleError as err:
            errors.append(err)
            continue
        pieces += [text[last:ex.span[0]], expected]
        last = ex.span[1]
        if expected != ex.shown:
            diff = "".join(difflib.unified_diff(
                ex.shown.splitlines(keepends=True), expected.splitlines(keepends=True),
                fromfile=f"{ex.where} (shown)", tofile=f"{ex.where} (program prints)"))
            drifts.append(Drift(ex, expected, diff))
    pieces.append(text[last:])
    return PageCheck(examples, drifts, errors, "".join(pieces))


def _page_key(name: str) -> str:
    path = os.path.relpath(os.path.abspath(name), ROOT).replace(os.sep, "/")
    if path not in PAGES:
        raise ExampleError(f"--page {name}: not a page with examples ({', '.join(PAGES)})")
    return path


def main(argv: list[str] | None = None, runner: Runner = run_subprocess) -> int:
    parser = argparse.ArgumentParser(prog="python docs/run_examples.py",
                                     description="Check (or with --write rewrite) every example output of the docs.")
    parser.add_argument("--write", action="store_true", help="rewrite the drifted outputs from a fresh run")
    parser.add_argument("--page", action="append", metavar="PAGE",
                        help=f"only this page (repeatable; default every page: {', '.join(PAGES)})")
    args = parser.parse_args(argv)
    checks: dict[str, tuple[str, PageCheck]] = {}
    try:
        pages = [_page_key(name) for name in args.page] if args.page else list(PAGES)
        for page in pages:
            text = open(os.path.join(ROOT, page), encoding="utf-8").read()
            checks[page] = (text, check_page(page, text, runner))
    except ExampleError as err:
        print(f"run_examples: error: {err}", file=sys.stderr)
        return 2
    errors = [err for _, check in checks.values() for err in check.errors]
    drifted = [d for _, check in checks.values() for d in check.drifts]
    if args.write:
        for page, (text, check) in checks.items():
            if not check.drifts:
                continue
            path = os.path.join(ROOT, page)
            if open(path, encoding="utf-8").read() != text:
                print(f"run_examples: error: {page} changed while the examples ran; run again", file=sys.stderr)
                return 2
            with open(path, "w", encoding="utf-8") as handle:
                handle.write(check.text)
            print(f"{page}: rewrote {len(check.drifts)} block(s) at line(s) "
                  f"{', '.join(str(d.example.line) for d in check.drifts)}")
    else:
        for drift in drifted:
            print(f"{drift.example.where}: the shown output differs from what "
                  f"`{drift.example.source.splitlines()[0]}` prints now:\n{drift.diff}", file=sys.stderr)
    for err in errors:
        print(f"run_examples: error: {err} (block left as it is)", file=sys.stderr)
    total = sum(len(check.examples) for _, check in checks.values())
    print(f"{total} example(s) on {len(checks)} page(s); {len(drifted)} drifted"
          + (" and rewritten" if args.write else "; rerun with --write to update them" if drifted else "")
          + (f"; {len(errors)} could not be checked" if errors else ""), file=sys.stderr)
    return 2 if errors else 1 if drifted and not args.write else 0


if __name__ == "__main__":
    sys.exit(main())
