"""Write throughput of the registry: one writer in a loop, then N spawned writer processes running the stress
workload of tests/test_concurrency_stress.py (create, link, rate, edit a shared entity, optimistic-lock counter),
on SQLite and on a throw-away PostgreSQL server.

Run: .venv/bin/python benchmarks/bench_registry_concurrency.py [--backend sqlite|postgresql|both]
     [--workers N [N ...]] [--rounds N] [--sequential N]

By default 8 and then 32 writer processes run on each backend. Every run reports lost updates (increments of the
shared counter that are missing from it), audit events minus successful writes, and unhandled errors (anything
other than a refused stale edit, which the workload retries); all three should be zero.

Writes per second count successful audited transactions (refused optimistic-lock attempts are reported apart).
The multi-process figure includes starting the processes, so it understates the steady-state rate.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))  # pgserver.py and the stress workload


def sequential(db: str, n: int) -> float:
    """Writes per second for one process adding instruments, one transaction each."""
    from ivdossier.registry import instruments as reg
    from ivdossier.registry.db import open_registry

    registry = open_registry(db)
    try:
        with registry.writing() as s:
            reg.add_program(s, actor="bench", slug="seq", title="Sequential writes")
        start = time.perf_counter()
        for i in range(n):
            with registry.writing() as s:
                reg.add_instrument(s, actor="bench", program="seq", slug=f"s{i}", name=f"Candidate {i}")
        return n / (time.perf_counter() - start)
    finally:
        registry.dispose()


def concurrent(db: str, workers: int, rounds: int) -> None:
    from test_concurrency_stress import run_stress

    outcome = run_stress(db, workers=workers, rounds=rounds)
    lost = (
        outcome.increments - outcome.counter
    )  # increments reported as committed but missing from the counter
    audit_gap = outcome.audit_events - outcome.setup_events - outcome.successful_writes
    for error in outcome.errors[:3]:
        print(f"    unhandled: {error.strip().splitlines()[0][:300]}")
    print(
        f"  {workers} processes x {rounds} rounds: {outcome.successful_writes} writes in {outcome.seconds:.1f} s "
        f"= {outcome.successful_writes / outcome.seconds:.0f} writes/s including process start, "
        f"{outcome.successful_writes / outcome.write_seconds:.0f} writes/s while writing "
        f"({outcome.write_seconds:.1f} s); "
        f"{outcome.conflicts} refused stale attempts retried; lost updates {lost}; "
        f"audit events minus writes {audit_gap}; errors {len(outcome.errors)}"
    )


def run(name: str, make_db: object, args: argparse.Namespace) -> None:
    print(f"\n[{name}]")
    rate = sequential(make_db(), args.sequential)  # type: ignore[operator]
    print(f"  1 process, {args.sequential} audited creates: {rate:.0f} writes/s")
    for workers in args.workers:
        concurrent(make_db(), workers, args.rounds)  # type: ignore[operator]


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--backend", choices=("sqlite", "postgresql", "both"), default="both")
    parser.add_argument("--workers", type=int, nargs="+", default=[8, 32])
    parser.add_argument("--rounds", type=int, default=10)
    parser.add_argument("--sequential", type=int, default=500)
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(prefix="ivd-conc-") as tmp:
        counter = iter(range(1000))
        if args.backend in ("sqlite", "both"):
            run("sqlite", lambda: str(Path(tmp) / f"r{next(counter)}.sqlite"), args)
        if args.backend in ("postgresql", "both"):
            from pgserver import find_pg_bin, start_server

            if find_pg_bin() is None:
                print("\n[postgresql] skipped: server binaries not installed (Debian package postgresql)")
                return
            server = start_server()
            try:
                run("postgresql", server.create_database, args)
            finally:
                server.stop()


if __name__ == "__main__":
    main()
