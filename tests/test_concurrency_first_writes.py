"""Check-then-insert transactions (such as loading the built-in catalogue into a new registry) that declare a
topic with serialize_writes run one after another on PostgreSQL too: all succeed and the rows exist once."""

from __future__ import annotations

import threading
from typing import Any

import pytest
from sqlalchemy import func, select

from ivdossier.errors import ConflictError
from ivdossier.registry import instruments as reg
from ivdossier.registry.db import Registry, open_registry, serialize_writes
from ivdossier.registry.models import Program

WRITERS = 8


def _add_if_missing(registry: Registry, serialize: bool, barrier: threading.Barrier) -> str:
    try:
        with registry.writing() as s:
            if serialize:
                serialize_writes(s, "first-programs")
            empty = s.scalars(select(func.count()).select_from(Program)).one() == 0
            barrier.wait(timeout=30)  # (unserialized) everyone has read before anyone inserts
            if empty:
                for i in range(3):
                    reg.add_program(s, actor="init", slug=f"p{i}", title=f"Program {i}")
        return "ok"
    except ConflictError as exc:
        return f"conflict: {exc}"


def _race(registry: Registry, serialize: bool) -> list[str]:
    barrier = threading.Barrier(WRITERS if not serialize else 1)
    results: list[str] = []
    lock = threading.Lock()

    def run() -> None:
        outcome = _add_if_missing(registry, serialize, barrier)
        with lock:
            results.append(outcome)

    threads = [threading.Thread(target=run) for _ in range(WRITERS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    return results


@pytest.mark.postgres
def test_serialized_check_then_insert_succeeds_for_every_writer_on_postgresql(pg_server: Any) -> None:
    registry = open_registry(pg_server.create_database())
    try:
        unserialized = _race(registry, serialize=False)
        # Without the lock, READ COMMITTED lets several writers see an empty table: duplicates are refused.
        assert any(
            r.startswith("conflict: an entity with the same name already exists") for r in unserialized
        )
        with registry.writing() as s:
            for p in s.scalars(select(Program)):
                s.delete(p)
        assert _race(registry, serialize=True) == ["ok"] * WRITERS
        with registry.reading() as s:
            assert s.scalars(select(func.count()).select_from(Program)).one() == 3
    finally:
        registry.dispose()


def test_serialize_writes_is_a_no_op_on_sqlite(sqlite_path: str) -> None:
    registry = open_registry(sqlite_path)
    try:
        assert _race(registry, serialize=True) == ["ok"] * WRITERS  # BEGIN IMMEDIATE already serializes
        with registry.reading() as s:
            assert s.scalars(select(func.count()).select_from(Program)).one() == 3
    finally:
        registry.dispose()
