"""Restore never silently unfreezes a plan; backups and restores leave no hidden files behind."""

from __future__ import annotations

import json
import sqlite3
import subprocess
from datetime import UTC, datetime
from pathlib import Path

import pytest

from ivdossier.errors import ConflictError
from ivdossier.registry import instruments as reg
from ivdossier.registry import records
from ivdossier.registry.backup import backup_registry, restore_registry
from ivdossier.registry.db import open_registry
from ivdossier.registry.models import Plan, Program


def _registry_with_draft(path: str) -> None:
    registry = open_registry(path)
    with registry.writing() as s:
        prog = reg.add_program(s, actor="ana", slug="tele", title="Telehealth")
        records.create(s, Plan(slug="pap", program_id=prog.id, title="Plan", content={"a": 1}), actor="ana")
    registry.dispose()


def _freeze(path: str) -> None:
    """Seal the plan the way a freeze leaves the row (state, time, author, hash)."""
    registry = open_registry(path)
    with registry.writing() as s:
        plan = records.get(s, Plan, "pap")
        records.edit(
            s,
            plan,
            {
                "state": "frozen",
                "frozen_at": datetime(2026, 3, 1, tzinfo=UTC),
                "frozen_by": "ana",
                "sha256": "c" * 64,
            },
            actor="ana",
            action="freeze",
        )
    registry.dispose()


def _plan_state(path: str) -> str:
    registry = open_registry(path)
    try:
        with registry.reading() as s:
            return records.get(s, Plan, "pap").state
    finally:
        registry.dispose()


def test_restoring_a_backup_from_before_the_freeze_is_refused_unless_asked_for(tmp_path: Path) -> None:
    db = str(tmp_path / "live.sqlite")
    _registry_with_draft(db)
    backup_registry(db, tmp_path / "before-freeze.sqlite")
    _freeze(db)
    with pytest.raises(
        ConflictError,
        match=r"restore refused, nothing was changed: plan 'pap' would become an editable draft again; .*"
        r"--allow-unfreeze",
    ):
        restore_registry(tmp_path / "before-freeze.sqlite", db, replace=True)
    assert _plan_state(db) == "frozen"
    summary = restore_registry(tmp_path / "before-freeze.sqlite", db, replace=True, allow_unfreeze=True)
    assert summary.unfrozen == ("plan 'pap' would become an editable draft again",)
    assert _plan_state(db) == "draft"


def test_a_backup_that_lacks_the_frozen_plan_is_refused_too(tmp_path: Path) -> None:
    db = str(tmp_path / "live.sqlite")
    registry = open_registry(db)
    with registry.writing() as s:
        reg.add_program(s, actor="ana", slug="tele", title="Telehealth")
    registry.dispose()
    backup_registry(db, tmp_path / "early.sqlite")
    registry = open_registry(db)
    with registry.writing() as s:
        prog = records.get(s, Program, "tele")
        records.create(s, Plan(slug="pap", program_id=prog.id, title="Plan"), actor="ana")
    registry.dispose()
    _freeze(db)
    with pytest.raises(ConflictError, match=r"plan 'pap' would disappear \(the backup predates it\)"):
        restore_registry(tmp_path / "early.sqlite", db, replace=True)


def test_cli_restore_warns_and_needs_the_flag(cli, sqlite_path: str, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _registry_with_draft(sqlite_path)
    assert cli("backup", str(tmp_path / "b.sqlite"))[0] == 0
    _freeze(sqlite_path)
    code, _, err = cli("restore", str(tmp_path / "b.sqlite"), "--replace")
    assert code == 4 and "plan 'pap' would become an editable draft again" in err
    code, out, err = cli("restore", str(tmp_path / "b.sqlite"), "--replace", "--allow-unfreeze", "--json")
    assert code == 0 and json.loads(out)["unfrozen"] == ["plan 'pap' would become an editable draft again"]
    assert "warning: plan 'pap' would become an editable draft again" in err


def test_backup_and_restore_leave_no_hidden_files(tmp_path: Path) -> None:
    live = tmp_path / "live"
    live.mkdir()
    db = str(live / "reg.sqlite")
    _registry_with_draft(db)
    out = tmp_path / "backups"
    out.mkdir()
    backup_registry(db, out / "b.sqlite")
    backup_registry(db, out / "b.sqlite", replace=True)
    assert sorted(p.name for p in out.iterdir()) == ["b.sqlite"]
    before = sorted(p.name for p in live.iterdir())
    restore_registry(out / "b.sqlite", db, replace=True)
    assert sorted(p.name for p in live.iterdir()) == before
    assert sorted(p.name for p in out.iterdir()) == ["b.sqlite"]


def test_a_backup_with_another_page_size_restores_without_leaving_a_staging_copy(tmp_path: Path) -> None:
    db = str(tmp_path / "reg.sqlite")
    _registry_with_draft(db)
    backup_registry(db, tmp_path / "b.sqlite")
    conn = sqlite3.connect(tmp_path / "b.sqlite")  # a copy rewritten with larger pages (e.g. by a DB tool)
    conn.execute("PRAGMA page_size=8192")
    conn.execute("VACUUM")
    conn.close()
    restore_registry(tmp_path / "b.sqlite", db, replace=True)
    assert not [p.name for p in tmp_path.iterdir() if ".restore" in p.name]
    assert _plan_state(db) == "draft"


def test_staging_copies_of_killed_restores_are_removed_by_the_next(tmp_path: Path) -> None:
    db = str(tmp_path / "reg.sqlite")
    _registry_with_draft(db)
    backup_registry(db, tmp_path / "b.sqlite")
    gone = subprocess.run(["true"], check=True)
    dead_pid = subprocess.Popen(["true"])
    dead_pid.wait()
    assert gone.returncode == 0
    for name in (".reg.sqlite.restore", f".reg.sqlite.restore-{dead_pid.pid}"):
        (tmp_path / name).write_bytes(b"x" * 1000)  # what a kill -9 half-way left
    restore_registry(tmp_path / "b.sqlite", db, replace=True)
    assert not [p.name for p in tmp_path.iterdir() if ".restore" in p.name]
