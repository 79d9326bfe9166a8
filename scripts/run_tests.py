"""Create the environment if needed, then run every check: ruff lint and format, mypy, and the pytest suite.

pytest's exit code 5 ("no tests collected") is treated as a failure so that an empty run never passes.
"""

from __future__ import annotations

import sys

from _venv import ensure_venv, run

LIBRARIES = ["ivdossier", "registry", "threats_catalog", "estimation", "reports", "workflows", "cli"]

if __name__ == "__main__":
    bin_dir = ensure_venv()
    steps = [
        [str(bin_dir / "ruff"), "check", "."],
        [str(bin_dir / "ruff"), "format", "--check", "."],
        [str(bin_dir / "mypy"), *LIBRARIES],
        [str(bin_dir / "python"), "-m", "pytest", "-n", "2", "-p", "no:cacheprovider", *sys.argv[1:]],
    ]
    for step in steps:
        code = run(step)
        if code == 5:
            print("pytest collected no tests: that is a failure, not a pass", flush=True)
            sys.exit(1)
        if code != 0:
            sys.exit(code)
    print("all checks passed", flush=True)
