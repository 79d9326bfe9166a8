"""Eight writer processes on one registry (SQLite and a real PostgreSQL server): no lost update, no unhandled
"database is locked", and exactly one audit event per successful write.

The workload lives here so that benchmarks/bench_registry_concurrency.py can time the same thing.
"""

from __future__ import annotations

import multiprocessing
import time
import traceback
from dataclasses import dataclass, field
from typing import Any

import pytest

WORKERS = 8
ROUNDS = 6
MAX_ATTEMPTS = 400
THREAT_CODES = ("T-S1", "T-S2", "T-S3")


@dataclass
class WorkerTally:
    """What one writer process did: successful writes per kind, retried conflicts, unexpected errors."""

    worker: int
    writes: dict[str, int] = field(default_factory=dict)
    conflicts: int = 0
    errors: list[str] = field(default_factory=list)
    started: float = 0.0  # wall-clock time of the first write attempt (after imports and opening)
    finished: float = 0.0

    def count(self, kind: str) -> None:
        self.writes[kind] = self.writes.get(kind, 0) + 1


def prepare(db_url: str, workers: int) -> int:
    """Create the shared registry: members, threats, a shared instrument and link, and the counter; returns
    the number of audit events written."""
    from sqlalchemy import func, select

    from ivdossier.registry import instruments as reg
    from ivdossier.registry import threats as thr
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import AuditEvent

    registry = open_registry(db_url)
    try:
        with registry.writing() as s:
            reg.add_program(s, actor="setup", slug="stress", title="Shared program")
            reg.add_program(s, actor="setup", slug="counter", title="Counter", notes="0")
            for w in range(workers):
                reg.add_member(s, actor="setup", handle=f"w{w}")
            for code in THREAT_CODES:
                thr.add_team_threat(
                    s, actor="setup", entry={"code": code, "title": code, "condition": "exclusion"}
                )
            reg.add_instrument(s, actor="setup", program="stress", slug="shared", name="Shared instrument")
            thr.link_threat(s, actor="setup", instrument="shared", code=THREAT_CODES[0])
        with registry.reading() as s:
            return int(s.scalars(select(func.count()).select_from(AuditEvent)).one())
    finally:
        registry.dispose()


def run_worker(db_url: str, worker: int, rounds: int) -> WorkerTally:
    """One writer: per round create an instrument, link a threat, rate two links, edit the shared instrument
    and increment the counter by read-modify-write with an expected version (retried on conflict)."""
    from sqlalchemy.exc import OperationalError

    from ivdossier.errors import ConflictError
    from ivdossier.registry import instruments as reg
    from ivdossier.registry import records
    from ivdossier.registry import threats as thr
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Instrument, Program

    tally = WorkerTally(worker=worker)
    me = f"w{worker}"
    registry = open_registry(db_url)

    def attempt(kind: str, work: Any) -> None:
        for _ in range(MAX_ATTEMPTS):
            try:
                registry.write_retrying(work)
            except ConflictError:
                tally.conflicts += 1
                continue
            tally.count(kind)
            return
        tally.errors.append(f"{kind}: still conflicting after {MAX_ATTEMPTS} attempts")

    def increment() -> None:
        for _ in range(MAX_ATTEMPTS):
            with registry.reading() as s:
                seen = records.get(s, Program, "counter")
                value, version = int(seen.notes), seen.version
            try:
                with registry.writing() as s:
                    prog = records.get(s, Program, "counter")
                    records.edit(s, prog, {"notes": str(value + 1)}, actor=me, expected_version=version)
            except ConflictError:
                tally.conflicts += 1
                continue
            tally.count("increment")
            return
        tally.errors.append(f"increment: still conflicting after {MAX_ATTEMPTS} attempts")

    tally.started = time.time()
    try:
        for i in range(rounds):
            slug = f"{me}-z{i}"
            code = THREAT_CODES[i % len(THREAT_CODES)]
            attempt(
                "create",
                lambda s, slug=slug: reg.add_instrument(s, actor=me, program="stress", slug=slug, name=slug),
            )
            attempt(
                "link",
                lambda s, slug=slug, code=code: thr.link_threat(s, actor=me, instrument=slug, code=code),
            )
            link = f"{slug}--{code.lower()}"
            attempt(
                "rate", lambda s, link=link: thr.rate_link(s, actor=me, link=link, likelihood=3, severity=2)
            )
            # The shared link: a new rating first, then a changed one every round (one audit event each).
            attempt(
                "rate",
                lambda s, i=i: thr.rate_link(
                    s, actor=me, link="shared--t-s1", likelihood=i % 5 + 1, severity=(i + worker) % 5 + 1
                ),
            )
            attempt(
                "edit",
                lambda s, i=i: records.edit(
                    s, records.get(s, Instrument, "shared"), {"description": f"{me} round {i}"}, actor=me
                ),
            )
            increment()
    except OperationalError as exc:  # the failure this test exists to rule out
        tally.errors.append(f"unhandled OperationalError: {exc}")
    except Exception:
        tally.errors.append(traceback.format_exc())
    finally:
        tally.finished = time.time()
        registry.dispose()
    return tally


def _worker_entry(args: tuple[str, int, int]) -> WorkerTally:
    return run_worker(*args)


@dataclass(frozen=True)
class StressOutcome:
    """Totals after all writers finished, and what the registry holds."""

    tallies: tuple[WorkerTally, ...]
    seconds: float
    counter: int
    audit_events: int
    setup_events: int
    instruments: int

    @property
    def successful_writes(self) -> int:
        return sum(sum(t.writes.values()) for t in self.tallies)

    @property
    def increments(self) -> int:
        return sum(t.writes.get("increment", 0) for t in self.tallies)

    @property
    def conflicts(self) -> int:
        return sum(t.conflicts for t in self.tallies)

    @property
    def write_seconds(self) -> float:
        """From the first worker's first write to the last worker's last: the span the writers overlapped in."""
        return max(t.finished for t in self.tallies) - min(t.started for t in self.tallies)

    @property
    def errors(self) -> list[str]:
        return [e for t in self.tallies for e in t.errors]


def run_stress(db_url: str, *, workers: int = WORKERS, rounds: int = ROUNDS) -> StressOutcome:
    """Prepare the registry, run `workers` spawned writer processes to completion and read back the totals."""
    from sqlalchemy import func, select

    from ivdossier.registry import records
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import AuditEvent, Instrument, Program

    setup_events = prepare(db_url, workers)
    ctx = multiprocessing.get_context("spawn")
    start = time.perf_counter()
    with ctx.Pool(workers) as pool:
        tallies = tuple(pool.map(_worker_entry, [(db_url, w, rounds) for w in range(workers)]))
    seconds = time.perf_counter() - start
    registry = open_registry(db_url)
    try:
        with registry.reading() as s:
            counter = int(records.get(s, Program, "counter").notes)
            events = int(s.scalars(select(func.count()).select_from(AuditEvent)).one())
            instruments = int(s.scalars(select(func.count()).select_from(Instrument)).one())
    finally:
        registry.dispose()
    return StressOutcome(tallies, seconds, counter, events, setup_events, instruments)


def _check(outcome: StressOutcome, workers: int, rounds: int) -> None:
    assert outcome.errors == []
    # No lost update: every successful read-modify-write increment is in the counter.
    assert outcome.increments == workers * rounds
    assert outcome.counter == outcome.increments
    # One audit event per successful write, none for refused ones.
    assert outcome.audit_events == outcome.setup_events + outcome.successful_writes
    assert outcome.instruments == 1 + workers * rounds
    assert all(t.writes.get("rate") == 2 * rounds for t in outcome.tallies)


@pytest.mark.slow
def test_eight_writers_on_sqlite_lose_nothing(sqlite_path: str) -> None:
    outcome = run_stress(sqlite_path)
    _check(outcome, WORKERS, ROUNDS)


@pytest.mark.slow
@pytest.mark.postgres
def test_eight_writers_on_postgresql_lose_nothing(pg_server: Any) -> None:
    outcome = run_stress(pg_server.create_database())
    _check(outcome, WORKERS, ROUNDS)
    assert (
        outcome.conflicts > 0 or outcome.counter == WORKERS * ROUNDS
    )  # conflicts are expected, never required


def test_stale_expected_version_is_refused_across_connections(sqlite_path: str) -> None:
    """The mechanism the stress test relies on, step by step: read, someone else writes, our write is refused."""
    from ivdossier.errors import ConflictError
    from ivdossier.registry import records
    from ivdossier.registry.db import open_registry
    from ivdossier.registry.models import Program

    prepare(sqlite_path, 2)
    first, second = open_registry(sqlite_path), open_registry(sqlite_path)
    try:
        with first.reading() as s:
            version = records.get(s, Program, "counter").version
        with second.writing() as s:
            records.edit(
                s, records.get(s, Program, "counter"), {"notes": "1"}, actor="w1", expected_version=version
            )
        with pytest.raises(ConflictError, match=r"changed by w1 at .* \(edit: notes\)"), first.writing() as s:
            records.edit(
                s, records.get(s, Program, "counter"), {"notes": "1"}, actor="w0", expected_version=version
            )
        with first.reading() as s:
            assert records.get(s, Program, "counter").version == version + 1
    finally:
        first.dispose()
        second.dispose()
