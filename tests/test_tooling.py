"""Project hygiene that CI enforces through the test suite: the linter, and the documentation's examples."""

from __future__ import annotations

import functools
import importlib.util
import pathlib
import re
import subprocess
import sys

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]


def test_ruff__whole_repository__passes_the_configured_rules():
    """ruff with the short rule set of pyproject.toml ([tool.ruff.lint]) over library, tests and scripts."""
    if importlib.util.find_spec("ruff") is None:
        pytest.skip("ruff is not installed (it comes with the [test] extra)")
    done = subprocess.run([sys.executable, "-m", "ruff", "check", "--no-cache", str(ROOT)],
                          capture_output=True, text=True, cwd=ROOT)
    assert done.returncode == 0, done.stdout + done.stderr


@functools.lru_cache(maxsize=1)
def _examples():
    """docs/run_examples.py, the one runner of every documentation example (docs/ is not a package)."""
    spec = importlib.util.spec_from_file_location("run_examples", ROOT / "docs" / "run_examples.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # its dataclasses look their module up while being defined
    spec.loader.exec_module(module)
    return module


#: Fewest examples each page must hold, so that the check below cannot pass on a page whose blocks it misses.
_MIN_EXAMPLES = {"README.md": 4, "docs/output.md": 5, "docs/api.md": 10}


@pytest.mark.parametrize("page", sorted(_MIN_EXAMPLES))
def test_doc_examples__every_block__shows_what_the_program_prints(page):
    """Every shell example (``$ areamc ...`` or an ``<!-- example: -->`` marker) and every Python example of
    the page prints what its block shows, with elided ``...`` lines; `python docs/run_examples.py --write` fixes
    a drifted block.  Shell commands run in this process (the subprocess gives the same output: see below)."""
    run = _examples()
    assert set(run.PAGES) == set(_MIN_EXAMPLES)
    text = (ROOT / page).read_text(encoding="utf-8")
    check = run.check_page(page, text, runner=run.run_in_process)
    assert len([ex for ex in check.examples if ex.shown is not None]) >= _MIN_EXAMPLES[page]
    assert not check.errors, "\n".join(str(err) for err in check.errors)
    assert not check.drifts, "run `python docs/run_examples.py --write`; drifted blocks:\n" + "\n".join(
        f"{d.example.where}\n{d.diff}" for d in check.drifts)


def test_doc_examples__in_process_run__prints_what_the_subprocess_prints():
    """The test above runs commands through ``areamc.cli.main`` in this process; the checker itself runs
    ``python -m areamc``.  Both must print the same (no terminal either way, worker processes, COLUMNS)."""
    run = _examples()
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    example = run.find_examples("README.md", readme)[0]
    args = run.command_args(example)
    assert run.run_in_process(args) == run.run_subprocess(args)


def test_readme__worked_example__is_the_output_of_the_first_set_up_command():
    """The README says its worked example is the first set-up command's output: the marker names that command."""
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    first = re.search(r"```sh\n(.*?)\n```", readme, re.S).group(1)
    command = first.split("&&")[-1].strip().removeprefix(".venv/bin/")
    assert _examples().find_examples("README.md", readme)[0].source == command


_PAGE = """Intro.

```sh
areamc inspect FILE        # not an example: no "$ " prompt
```

<!-- example: areamc inspect a.gpkg -->
```
old
```

```
$ areamc area a.gpkg \\
    --seed 1
areamc area: a.gpkg
...
total 1
```
"""


def _fake(outputs):
    """A runner that prints `outputs[argv]`, standing in for the program in the tests of the mechanism."""
    return lambda args: _examples().Completed(0, outputs[" ".join(args)], "")


def test_doc_examples__fake_program__drifted_bodies_rewritten_prose_kept():
    run = _examples()
    outputs = {"inspect a.gpkg": "new\n", "area a.gpkg --seed 1": "areamc area: a.gpkg\nrow 1\nrow 2\ntotal 2\n"}
    check = run.check_page("README.md", _PAGE, runner=_fake(outputs))
    assert [(ex.line, ex.source) for ex in check.examples] == [(8, "areamc inspect a.gpkg"),
                                                              (12, "areamc area a.gpkg --seed 1")]
    assert [d.example.where for d in check.drifts] == ["README.md:8", "README.md:12"] and not check.errors
    assert "-old\n+new\n" in check.drifts[0].diff and "-total 1\n+total 2\n" in check.drifts[1].diff
    assert check.text == _PAGE.replace("old\n", "new\n").replace("total 1\n", "total 2\n")
    again = run.check_page("README.md", check.text, runner=_fake(outputs))
    assert again.drifts == [] and again.text == check.text


OUT = "h1\nh2\n\nid a\nD01 1 x\nD01 2 x\nD02 1 y\nD02 2 y\nD03 1 z\n\nfoot\n"


@pytest.mark.parametrize("shown, expected", [
    ("anything\n", OUT),                                                   # no "...": the whole output
    ("h1\nh2 old\n...\nfoot\n", "h1\nh2\n...\nfoot\n"),                # top run from the top, last from the end
    ("...\nid b\nD01 1 w\n...\n", "...\nid a\nD01 1 x\n...\n"),        # middle run: first line with its first word
    ("h1\n...\nD02 2 y\n...\nfoot\n", "h1\n...\nD02 2 y\n...\nfoot\n"),  # an equal line wins over the first D02
    ("h1\n...\nD02 9 q\n...\n\nfoot\n", "h1\n...\nD02 1 y\n...\n\nfoot\n"),
])
def test_refill__elided_blocks__keep_their_runs_and_elisions(shown, expected):
    """The rule of docs/run_examples.py's docstring, on a small made-up output."""
    assert _examples().refill(shown, OUT) == expected
    assert _examples().refill(expected, OUT) == expected  # an up-to-date block stays as it is


@pytest.mark.parametrize("shown, match", [
    ("...\nD09 1\n...\n", "starts with 'D09'"),                          # no such row
    ("h1\nh2\n\nid a\nD01 1 x\n...\nD01 2 x\nD02 1 y\nD02 2 y\nD03 1 z\n\nfoot\n", "no room"),  # "..." = no line
    ("\n".join(["x"] * 12) + "\n...\nfoot\n", "no room"),                 # more shown lines than printed
    ("h1\nh2\n\nD01 1 x\n...\nfoot\n", "changed shape"),                # a row id would land on a heading
])
def test_refill__lines_that_cannot_be_placed__refused(shown, match):
    run = _examples()
    with pytest.raises(run.ExampleError, match=match):
        run.refill(shown, OUT, "page.md:1")


@pytest.mark.parametrize("command, match", [
    ("areamc area a.gpkg --units km2", "needs a fixed --seed"),              # area samples
    ("areamc coverage a.gpkg b.gpkg -n 100", "needs a fixed --seed"),
    ("areamc area a.gpkg --seed 1 | head", "only a plain"),                  # shell syntax does not run
    ("python -m areamc inspect a.gpkg", "only a plain"),
])
def test_command_args__unseeded_sampling_or_shell_syntax__refused(command, match):
    run = _examples()
    example = run.Example("README.md", 7, "shell", command, "", (0, 0))
    with pytest.raises(run.ExampleError, match=r"README\.md:7: .*" + match):
        run.command_args(example)


def test_command_args__seeded_or_non_sampling_commands__accepted():
    run = _examples()
    for command in ("areamc inspect a.gpkg", "areamc area a.gpkg -s 3", "areamc integrate a.gpkg --density b --seed 0"):
        assert run.command_args(run.Example("README.md", 1, "shell", command, "", (0, 0))) == command.split()[1:]


def test_doc_examples__failing_command__named_with_its_line_and_left_as_it_is():
    run = _examples()
    outputs = {"area a.gpkg --seed 1": "areamc area: a.gpkg\nrow 1\ntotal 2\n"}

    def runner(args):
        if args[0] == "inspect":
            return run.Completed(2, "", "areamc: error: a.gpkg: no such file")
        return _fake(outputs)(args)

    check = run.check_page("README.md", _PAGE, runner=runner)
    assert [str(err) for err in check.errors] == [
        "README.md:8: `areamc inspect a.gpkg` exited with status 2: areamc: error: a.gpkg: no such file"]
    assert check.text == _PAGE.replace("total 1\n", "total 2\n")  # the other block is still rewritten
