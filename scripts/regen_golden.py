"""Regenerate the golden Markdown dossiers of the demo (tests/golden/*.md) that tests/test_demo_dossiers.py checks.

How: `.venv/bin/python scripts/regen_golden.py` from the repository root. It builds the demo in a temporary folder
with the deterministic clock `ivdossier.workflows.demo.ticking_clock()`, renders each instrument's dossier with
`demo_markdown` (paths relative to the demo folder, generation time `REPRODUCIBLE_AT`, no run timings or installed
versions) and overwrites the golden files.

When: only after an intended change to what a dossier says or how it is laid out (a new section, new wording, a
changed rule, a changed demo scenario). Read `git diff tests/golden/` before committing: every changed line should be
one you meant to change. Never regenerate to make a failing test pass without knowing why the output moved.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
GOLDEN = ROOT / "tests" / "golden"


def main() -> int:
    from ivdossier.workflows.demo import build_demo, demo_markdown, ticking_clock

    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "demo"
        build_demo(out, clock=ticking_clock())
        documents = demo_markdown(out)
    GOLDEN.mkdir(parents=True, exist_ok=True)
    for slug, text in sorted(documents.items()):
        path = GOLDEN / f"{slug}.md"
        path.write_text(text, encoding="utf-8")
        print(f"wrote {path.relative_to(ROOT)} ({len(text.splitlines())} lines)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
