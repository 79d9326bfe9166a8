"""Backup and restore of SQLite registries: a consistent copy even while another process writes, checked
before it replaces anything."""

from __future__ import annotations

import json
import sqlite3
import threading
from pathlib import Path

import pytest
from sqlalchemy import func, select

from ivdossier.errors import InvalidInputError
from ivdossier.registry import instruments as reg
from ivdossier.registry import records
from ivdossier.registry.backup import backup_registry, restore_registry
from ivdossier.registry.db import SCHEMA_HEAD, open_registry
from ivdossier.registry.models import AuditEvent, Program


def _seed(path: str, n: int = 3) -> None:
    registry = open_registry(path)
    try:
        with registry.writing() as s:
            for i in range(n):
                reg.add_program(s, actor="ana", slug=f"p{i}", title=f"Program {i}")
    finally:
        registry.dispose()


def _programs(path: str) -> list[str]:
    registry = open_registry(path)
    try:
        with registry.reading() as s:
            return list(s.scalars(select(Program.slug).order_by(Program.slug)))
    finally:
        registry.dispose()


def test_backup_and_restore_round_trip(tmp_path: Path) -> None:
    db = str(tmp_path / "live.sqlite")
    _seed(db)
    summary = backup_registry(db, tmp_path / "copy.sqlite")
    assert (summary.schema, summary.audit_events) == (SCHEMA_HEAD, 3)
    registry = open_registry(db)
    with registry.writing() as s:
        records.edit(s, records.get(s, Program, "p0"), {"title": "changed after the backup"}, actor="ben")
    registry.dispose()
    with pytest.raises(InvalidInputError, match="already holds 4 audited changes; pass --replace"):
        restore_registry(tmp_path / "copy.sqlite", db)
    restored = restore_registry(tmp_path / "copy.sqlite", db, replace=True)
    assert restored.audit_events == 3
    registry = open_registry(db)
    with registry.reading() as s:
        assert records.get(s, Program, "p0").title == "Program 0"
    registry.dispose()


def test_backup_taken_while_another_thread_writes_is_consistent(tmp_path: Path) -> None:
    db = str(tmp_path / "live.sqlite")
    _seed(db, 1)
    stop = threading.Event()

    def writer() -> None:
        registry = open_registry(db)
        i = 0
        while not stop.is_set():
            with registry.writing() as s:
                reg.add_program(s, actor="w", slug=f"w{i}", title="busy")
            i += 1
        registry.dispose()

    thread = threading.Thread(target=writer)
    thread.start()
    try:
        for n in range(3):
            backup_registry(db, tmp_path / f"snap{n}.sqlite")
    finally:
        stop.set()
        thread.join()
    for n in range(3):
        conn = sqlite3.connect(tmp_path / f"snap{n}.sqlite")
        programs = conn.execute("SELECT count(*) FROM program").fetchone()[0]
        events = conn.execute("SELECT count(*) FROM audit_event").fetchone()[0]
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        conn.close()
        assert programs == events  # every program came with its audit event: no torn copy


def test_backup_and_restore_mistakes_are_clear(tmp_path: Path) -> None:
    db = str(tmp_path / "live.sqlite")
    _seed(db)
    backup_registry(db, tmp_path / "copy.sqlite")
    with pytest.raises(InvalidInputError, match="already exists; choose a new file name or pass --replace"):
        backup_registry(db, tmp_path / "copy.sqlite")
    with pytest.raises(InvalidInputError, match="must differ from the registry file"):
        backup_registry(db, db)
    with pytest.raises(InvalidInputError, match="work on SQLite registry files; for PostgreSQL use"):
        backup_registry("postgresql://u@h/db", tmp_path / "x.sqlite")
    (tmp_path / "text.sqlite").write_text("not a database")
    with pytest.raises(InvalidInputError, match="is not an SQLite database"):
        restore_registry(tmp_path / "text.sqlite", db, replace=True)
    other = sqlite3.connect(tmp_path / "other.sqlite")
    other.execute("CREATE TABLE t (x)")
    other.close()
    with pytest.raises(InvalidInputError, match="is not an ivdossier registry"):
        restore_registry(tmp_path / "other.sqlite", db, replace=True)
    assert _programs(db) == ["p0", "p1", "p2"]  # refused restores left the registry alone


def test_cli_backup_and_restore(cli, sqlite_path: str, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _seed(sqlite_path)
    code, out, err = cli("backup", str(tmp_path / "b.sqlite"))
    assert code == 0, err
    assert out.startswith(
        f"backed up {sqlite_path} to {tmp_path / 'b.sqlite'} (schema {SCHEMA_HEAD}, 3 audit events)"
    )
    fresh = tmp_path / "fresh.sqlite"
    code, out, err = cli("--db", str(fresh), "restore", str(tmp_path / "b.sqlite"), "--json")
    assert code == 0, err
    assert json.loads(out)["audit_events"] == 3
    assert _programs(str(fresh)) == ["p0", "p1", "p2"]
    registry = open_registry(str(fresh))
    with registry.reading() as s:
        assert s.scalars(select(func.count()).select_from(AuditEvent)).one() == 3
    registry.dispose()
