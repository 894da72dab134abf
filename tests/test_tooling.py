"""Project hygiene that CI enforces through the test suite: the linter, and the API page's examples."""

from __future__ import annotations

import importlib.util
import pathlib
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


def _api_runner():
    spec = importlib.util.spec_from_file_location("run_api_examples", ROOT / "docs" / "run_api_examples.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def test_api_page__every_example__runs_and_prints_what_the_page_shows():
    """Every ```python block of docs/api.md, run in order in one session, prints its ```text block."""
    runner = _api_runner()
    text = (ROOT / "docs" / "api.md").read_text(encoding="utf-8")
    found = runner.examples(text)
    assert len(found) >= 10
    printed = runner.run([code for code, _, _ in found])
    for n, ((_, shown, _), out) in enumerate(zip(found, printed), start=1):
        if shown is not None:
            assert out == shown, f"docs/api.md example {n} prints\n{out}\nbut the page shows\n{shown}"
