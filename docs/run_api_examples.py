"""Run every Python example of docs/api.md in order, in one namespace, from the repository root.

``python docs/run_api_examples.py`` checks that each example still prints
what the page shows below it (the ```text block that follows); with
``--write`` it rewrites those blocks from a fresh run instead.  The test
suite runs the check (tests/test_docs.py).
"""

from __future__ import annotations

import contextlib
import io
import os
import re
import sys
import warnings

PAGE = os.path.join(os.path.dirname(os.path.abspath(__file__)), "api.md")
ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
_BLOCK = re.compile(r"```python\n(.*?)```\n(?:\n```text\n(.*?)```\n)?", re.S)


def examples(text: str) -> list[tuple[str, str | None, tuple[int, int] | None]]:
    """(code, shown output or None, span of the output block's body or None) for each Python block."""
    out = []
    for match in _BLOCK.finditer(text):
        span = match.span(2) if match.group(2) is not None else None
        out.append((match.group(1), match.group(2), span))
    return out


def run(code_blocks: list[str]) -> list[str]:
    """Execute the blocks in order in one namespace; return what each printed."""
    namespace: dict = {"__name__": "__api_examples__"}
    printed = []
    cwd = os.getcwd()
    os.chdir(ROOT)
    try:
        for code in code_blocks:
            buffer = io.StringIO()
            with contextlib.redirect_stdout(buffer), warnings.catch_warnings():
                warnings.simplefilter("ignore")
                exec(compile(code, PAGE, "exec"), namespace)  # the page's own examples, not user input
            printed.append(buffer.getvalue())
    finally:
        os.chdir(cwd)
    return printed


def main(argv: list[str]) -> int:
    text = open(PAGE, encoding="utf-8").read()
    found = examples(text)
    printed = run([code for code, _, _ in found])
    if "--write" in argv:
        pieces, last = [], 0
        for (_, _, span), out in zip(found, printed):
            if span is None:
                continue
            pieces += [text[last:span[0]], out]
            last = span[1]
        pieces.append(text[last:])
        with open(PAGE, "w", encoding="utf-8") as handle:
            handle.write("".join(pieces))
        return 0
    bad = [i for i, ((_, shown, _), out) in enumerate(zip(found, printed)) if shown is not None and shown != out]
    for i in bad:
        print(f"example {i + 1}: the page shows\n{found[i][1]}but it prints\n{printed[i]}", file=sys.stderr)
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
