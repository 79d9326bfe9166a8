"""Whole-process time of `ivdossier site` on the scale benchmark's synthetic registry (target: 1,000 instruments
under 5 s; 10,000 reported).

Run: .venv/bin/python benchmarks/bench_site.py [--sizes 1000,10000] [--repeat 5] [--backend sqlite|postgresql]

The registry is bulk-loaded exactly as benchmarks/bench_registry_scale.py loads it (500 threats, 20 links per
instrument, two ratings on the first 40,000 links). Each size gets its own registry; the command runs in a fresh
process each time, sizes interleaved (A B A B ...), and the median of the runs is printed per size.
"""

from __future__ import annotations

import argparse
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT.parent / "tests"))  # pgserver.py

from bench_registry_scale import load  # noqa: E402

TARGET_1000 = 5.0


def run_site(db: str, out: Path) -> tuple[float, float, str]:
    """Wall and CPU seconds of one `ivdossier site` process, and what it printed."""
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    start = time.perf_counter()
    proc = subprocess.run(
        [sys.executable, "-m", "ivdossier.cli", "--db", db, "--as", "ana", "site", str(out)],
        capture_output=True,
        text=True,
    )
    seconds = time.perf_counter() - start
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    if proc.returncode != 0:
        raise RuntimeError(proc.stderr or proc.stdout)
    cpu = after.ru_utime - before.ru_utime + after.ru_stime - before.ru_stime
    return seconds, cpu, proc.stdout.strip()


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--sizes", default="1000,10000", help="Comma-separated instrument counts.")
    parser.add_argument("--repeat", type=int, default=5)
    parser.add_argument("--threats", type=int, default=500)
    parser.add_argument("--links-per-instrument", type=int, default=20)
    parser.add_argument("--backend", choices=("sqlite", "postgresql"), default="sqlite")
    args = parser.parse_args()
    sizes = [int(s) for s in args.sizes.split(",") if s.strip()]
    server = None
    with tempfile.TemporaryDirectory(prefix="ivd-site-") as tmp:
        folder = Path(tmp)
        if args.backend == "postgresql":
            from pgserver import find_pg_bin, start_server

            if find_pg_bin() is None:
                print("postgresql skipped: server binaries not installed (Debian package postgresql)")
                return
            server = start_server()
        try:
            dbs = {}
            for n in sizes:
                db = server.create_database() if server else str(folder / f"site-{n}.sqlite")
                start = time.perf_counter()
                load(db, instruments=n, threats=args.threats, links_per_instrument=args.links_per_instrument)
                print(f"loaded {n} instruments in {time.perf_counter() - start:.1f} s")
                dbs[n] = db
            times: dict[int, list[float]] = {n: [] for n in sizes}
            cpu: dict[int, list[float]] = {n: [] for n in sizes}
            note: dict[int, str] = {}
            for _ in range(args.repeat):
                for n in sizes:  # interleaved, so a change in machine load touches every size alike
                    seconds, used, note[n] = run_site(dbs[n], folder / f"out-{n}")
                    times[n].append(seconds)
                    cpu[n].append(used)
            for n in sizes:
                median = statistics.median(times[n])
                runs = ", ".join(f"{t:.2f}" for t in times[n])
                flag = ""
                if n == 1000:
                    flag = "  within the 5 s target" if median < TARGET_1000 else "  OVER the 5 s target"
                print(
                    f"site, {n:>6} instruments ({args.backend}): median {median:6.2f} s  [{runs}]  "
                    f"(CPU {statistics.median(cpu[n]):.2f} s){flag}"
                )
                print(f"    {note[n]}")
        finally:
            if server is not None:
                server.stop()


if __name__ == "__main__":
    main()
