"""Start-up time of the command line: `ivdossier --help` and a listing command, in fresh processes.

Prints the median of several runs and which heavy modules each command imported. Run with the project's venv:
    .venv/bin/python benchmarks/bench_startup.py
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HEAVY = ("pandas", "statsmodels", "matplotlib", "scipy", "numpy", "networkx")
PROBE = (
    "import sys, runpy; sys.argv = {argv!r}; "
    "import ivdossier.cli.app as a\n"
    "try:\n    a.main()\nexcept SystemExit:\n    pass\n"
    "print('HEAVY=' + ','.join(m for m in {heavy!r} if m in sys.modules), file=sys.stderr)"
)


def measure(argv: list[str], repeat: int = 7) -> tuple[float, str]:
    times = []
    heavy = ""
    for _ in range(repeat):
        start = time.perf_counter()
        proc = subprocess.run(
            [sys.executable, "-c", PROBE.format(argv=["ivdossier", *argv], heavy=HEAVY)],
            capture_output=True,
            text=True,
        )
        times.append(time.perf_counter() - start)
        heavy = next((line[6:] for line in proc.stderr.splitlines() if line.startswith("HEAVY=")), "?")
    return statistics.median(times), heavy


def main() -> None:
    baseline = statistics.median([_timed([sys.executable, "-c", "pass"]) for _ in range(7)])
    print(f"python -c pass: {baseline * 1000:.0f} ms (interpreter start-up, for reference)")
    with tempfile.TemporaryDirectory() as tmp:
        db = str(Path(tmp) / "r.sqlite")
        subprocess.run([sys.executable, "-m", "ivdossier.cli", "--db", db, "init"], capture_output=True)
        for argv in (["--help"], ["instrument", "--help"], ["--db", db, "program", "list"]):
            median, heavy = measure(argv)
            print(
                f"ivdossier {' '.join(argv):<40} {median * 1000:6.0f} ms   heavy modules loaded: {heavy or 'none'}"
            )


def _timed(cmd: list[str]) -> float:
    start = time.perf_counter()
    subprocess.run(cmd, capture_output=True)
    return time.perf_counter() - start


if __name__ == "__main__":
    main()
