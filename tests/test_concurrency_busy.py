"""Transient write failures: a PostgreSQL deadlock becomes a BusyError (nothing written, "run the command again"),
`write_retrying` reruns the whole transaction after one, and optimistic-lock conflicts are never retried."""

from __future__ import annotations

import threading
from typing import Any

import pytest

from ivdossier.errors import ConflictError
from ivdossier.registry import instruments as reg
from ivdossier.registry import records
from ivdossier.registry.db import BusyError, Registry, open_registry
from ivdossier.registry.models import Program


def _two_programs(db: str) -> Registry:
    registry = open_registry(db)
    with registry.writing() as s:
        reg.add_program(s, actor="ana", slug="a", title="A")
        reg.add_program(s, actor="ana", slug="b", title="B")
    return registry


@pytest.mark.postgres
def test_postgresql_deadlock_is_a_busy_error_and_leaves_nothing_half_written(pg_server: Any) -> None:
    registry = _two_programs(pg_server.create_database())
    barrier = threading.Barrier(2, timeout=20)
    outcomes: dict[str, BaseException | None] = {}

    def writer(name: str, first: str, second: str) -> None:
        try:
            with registry.writing() as s:
                records.edit(s, records.get(s, Program, first), {"notes": name}, actor=name)
                barrier.wait()  # both now hold one row lock and ask for the other's
                records.edit(s, records.get(s, Program, second), {"notes": name}, actor=name)
            outcomes[name] = None
        except BaseException as exc:
            outcomes[name] = exc

    threads = [
        threading.Thread(target=writer, args=("ana", "a", "b")),
        threading.Thread(target=writer, args=("ben", "b", "a")),
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    try:
        failures = [exc for exc in outcomes.values() if exc is not None]
        assert len(failures) == 1, outcomes
        assert isinstance(failures[0], BusyError)
        assert "deadlock detected" in str(
            failures[0]
        ) and "nothing was written, run the command again" in str(failures[0])
        winner = next(name for name, exc in outcomes.items() if exc is None)
        with registry.reading() as s:
            # The winner's two edits are both there; the loser's first edit was rolled back with the second.
            assert {records.get(s, Program, slug).notes for slug in ("a", "b")} == {winner}
    finally:
        registry.dispose()


def test_write_retrying_reruns_the_whole_transaction_after_a_busy_error(sqlite_path: str) -> None:
    registry = _two_programs(sqlite_path)
    calls: list[int] = []

    def work(s: Any) -> int:
        calls.append(1)
        records.edit(s, records.get(s, Program, "a"), {"notes": f"try {len(calls)}"}, actor="ana")
        if len(calls) < 3:
            raise BusyError("simulated lock timeout")
        return len(calls)

    try:
        assert registry.write_retrying(work) == 3
        with registry.reading() as s:
            prog = records.get(s, Program, "a")
            assert (prog.notes, prog.version) == ("try 3", 2)  # the two failed attempts left no trace
        calls.clear()
        with pytest.raises(BusyError, match="simulated lock timeout"):
            registry.write_retrying(work, attempts=2)
        assert len(calls) == 2
    finally:
        registry.dispose()


def test_optimistic_lock_conflicts_are_not_retried(sqlite_path: str) -> None:
    registry = _two_programs(sqlite_path)
    calls: list[int] = []

    def stale(s: Any) -> None:
        calls.append(1)
        records.edit(s, records.get(s, Program, "a"), {"notes": "x"}, actor="ana", expected_version=7)

    try:
        with pytest.raises(ConflictError, match="version 7 does not exist yet"):
            registry.write_retrying(stale)
        assert calls == [1]
    finally:
        registry.dispose()


@pytest.mark.postgres
def test_change_committed_between_read_and_write_is_named_in_the_conflict(pg_server: Any) -> None:
    """Our transaction read version 1; another committed version 2 before our UPDATE: refused, and it says why."""
    registry = _two_programs(pg_server.create_database())
    try:
        with (
            pytest.raises(
                ConflictError, match=r"version 2, not 1: it was changed by ben at .* \(edit: notes\)"
            ),
            registry.writing() as s,
        ):
            prog = records.get(s, Program, "a")  # read at version 1
            with registry.writing() as other:
                records.edit(other, records.get(other, Program, "a"), {"notes": "ben's"}, actor="ben")
            records.edit(s, prog, {"title": "ana's"}, actor="ana", expected_version=1)
        with registry.reading() as s:
            prog = records.get(s, Program, "a")
            assert (prog.title, prog.notes, prog.version) == ("A", "ben's", 2)
    finally:
        registry.dispose()


@pytest.mark.postgres
def test_racing_creates_of_one_slug_leave_one_row_and_one_clear_conflict(pg_server: Any) -> None:
    """Both writers pass the 'name free?' check; the unique index decides and the loser gets a ConflictError."""
    registry = open_registry(pg_server.create_database())
    barrier = threading.Barrier(2, timeout=20)
    outcomes: dict[str, BaseException | None] = {}

    def writer(name: str) -> None:
        try:
            with registry.writing() as s:
                assert records.find(s, Program, "tele") is None
                barrier.wait()
                reg.add_program(s, actor=name, slug="tele", title=f"{name}'s program")
            outcomes[name] = None
        except BaseException as exc:
            outcomes[name] = exc

    threads = [threading.Thread(target=writer, args=(n,)) for n in ("ana", "ben")]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    try:
        failures = [exc for exc in outcomes.values() if exc is not None]
        assert len(failures) == 1 and isinstance(failures[0], ConflictError), outcomes
        # Which check stops the loser depends on scheduling: if the winner commits before the loser's create()
        # looks the name up (READ COMMITTED sees the new row), create()'s own check refuses; else the unique index.
        message = str(failures[0])
        assert (
            "an entity with the same name already exists" in message
            or "a program named 'tele' already exists" in message
        ), message
        with registry.reading() as s:
            winner = next(n for n, exc in outcomes.items() if exc is None)
            assert records.get(s, Program, "tele").title == f"{winner}'s program"
    finally:
        registry.dispose()
