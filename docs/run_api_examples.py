"""Check (or with ``--write`` rewrite) the outputs of docs/api.md's Python examples.

Kept because docs/api.md names it: it is ``python docs/run_examples.py --page docs/api.md``,
the one runner of every documentation example (see that module for the rules).
"""

from __future__ import annotations

import os
import sys

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from run_examples import main  # noqa: E402

if __name__ == "__main__":
    sys.exit(main(["--page", "docs/api.md", *sys.argv[1:]]))
