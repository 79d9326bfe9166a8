"""Create the environment if needed, install ivdossier and run the invented demo end to end into ./demo-out."""

from __future__ import annotations

import sys

from _venv import ROOT, ensure_venv, run

if __name__ == "__main__":
    bin_dir = ensure_venv()
    sys.exit(run([str(bin_dir / "ivdossier"), "demo", "--out", str(ROOT / "demo-out"), "--replace"]))
