"""The registry keeps every write whole, versions every edit and upgrades its schema on open, on both backends."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy import select

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError
from ivdossier.registry import instruments as reg
from ivdossier.registry import records
from ivdossier.registry.db import SCHEMA_HEAD, current_revision, open_registry, resolve_url
from ivdossier.registry.models import AuditEvent, Instrument, Program


def _program(session, slug: str = "tele") -> Program:
    return reg.add_program(session, actor="ana", slug=slug, title="Telehealth and emergency visits")


def test_schema_head_matches_newest_migration() -> None:
    versions = Path(__file__).resolve().parent.parent / "registry" / "migrations" / "versions"
    newest = max(p.name.split("_", 1)[0] for p in versions.glob("[0-9]*_*.py"))
    assert newest == SCHEMA_HEAD


def test_open_creates_schema_at_head(db_url: str) -> None:
    registry = open_registry(db_url)
    try:
        assert current_revision(registry.engine) == SCHEMA_HEAD
        # Opening again is a no-op on an up-to-date registry.
        open_registry(db_url).dispose()
    finally:
        registry.dispose()


def test_failed_write_leaves_no_partial_rows(db_url: str) -> None:
    registry = open_registry(db_url)
    try:
        with pytest.raises(NotFoundError, match="no program named 'missing'"), registry.writing() as s:
            _program(s, "first")
            reg.add_instrument(s, actor="ana", program="missing", slug="z1", name="Z one")
        with registry.reading() as s:
            assert s.scalars(select(Program)).all() == []
            assert s.scalars(select(AuditEvent)).all() == []
    finally:
        registry.dispose()


def test_every_write_is_audited_with_before_and_after(db_url: str) -> None:
    registry = open_registry(db_url)
    try:
        with registry.writing() as s:
            _program(s)
            reg.add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre wave")
        with registry.writing() as s:
            reg.move_instrument(s, actor="ben", instrument="fibre", to="vetting", reason="schedule obtained")
        with registry.reading() as s:
            events = s.scalars(select(AuditEvent).order_by(AuditEvent.id)).all()
            assert [(e.actor, e.action, e.entity_label) for e in events] == [
                ("ana", "create", "tele"),
                ("ana", "create", "fibre"),
                ("ben", "move", "fibre"),
            ]
            assert events[-1].before == {"state": "proposed"}
            assert events[-1].after == {"state": "vetting"}
            assert events[-1].reason == "schedule obtained"
            assert events[0].at.tzinfo is not None
    finally:
        registry.dispose()


def test_stale_edit_is_refused_and_names_who_changed_it(db_url: str) -> None:
    registry = open_registry(db_url)
    try:
        with registry.writing() as s:
            _program(s)
        with registry.writing() as s:
            prog = records.get(s, Program, "tele")
            records.edit(s, prog, {"notes": "first"}, actor="ben", expected_version=1)
        with (
            pytest.raises(ConflictError, match=r"version 2, not 1: it was changed by ben"),
            registry.writing() as s,
        ):
            prog = records.get(s, Program, "tele")
            records.edit(s, prog, {"notes": "second"}, actor="cai", expected_version=1)
        with registry.reading() as s:
            assert records.get(s, Program, "tele").notes == "first"
    finally:
        registry.dispose()


def test_concurrent_sessions_cannot_overwrite_each_other(sqlite_path: str) -> None:
    registry = open_registry(sqlite_path)
    try:
        with registry.writing() as s:
            _program(s)
        with registry.reading() as s1:
            stale = records.get(s1, Program, "tele")
        with registry.writing() as s:
            records.edit(s, records.get(s, Program, "tele"), {"notes": "fresh"}, actor="ben")
        with pytest.raises(ConflictError, match="someone else changed this entity"), registry.writing() as s:
            s.add(stale)  # re-attach the copy read at version 1
            stale.notes = "stale"
    finally:
        registry.dispose()


def test_lifecycle_moves_follow_the_allowed_graph(sqlite_path: str) -> None:
    registry = open_registry(sqlite_path)
    try:
        with registry.writing() as s:
            _program(s)
            reg.add_instrument(s, actor="ana", program="tele", slug="fibre", name="Fibre wave")
        with (
            pytest.raises(InvalidInputError, match="it can move to vetting, rejected, shelved, not adopted"),
            registry.writing() as s,
        ):
            reg.move_instrument(s, actor="ana", instrument="fibre", to="adopted", reason="why not")
        with pytest.raises(InvalidInputError, match="needs a reason"), registry.writing() as s:
            reg.move_instrument(s, actor="ana", instrument="fibre", to="vetting", reason="  ")
        with registry.reading() as s:
            assert records.get(s, Instrument, "fibre").state == "proposed"
    finally:
        registry.dispose()


def test_duplicate_slug_is_a_conflict(sqlite_path: str) -> None:
    registry = open_registry(sqlite_path)
    try:
        with registry.writing() as s:
            _program(s)
        with (
            pytest.raises(ConflictError, match="a program named 'tele' already exists"),
            registry.writing() as s,
        ):
            _program(s)
    finally:
        registry.dispose()


@pytest.mark.parametrize("bad", ["Upper", "has space", "-lead", "x" * 65, "../escape", "semi;colon"])
def test_slugs_are_restricted_to_safe_characters(bad: str) -> None:
    with pytest.raises(InvalidInputError, match=r"slug .* is not allowed"):
        records.check_slug(bad, what="program")


def test_resolve_url_accepts_paths_and_postgres_urls(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("IVDOSSIER_DB", raising=False)
    assert resolve_url(None) == "sqlite:///ivdossier.sqlite"
    assert resolve_url("x/y.sqlite") == "sqlite:///x/y.sqlite"
    assert resolve_url("postgresql://u@h/db") == "postgresql+psycopg://u@h/db"
    monkeypatch.setenv("IVDOSSIER_DB", "env.sqlite")
    assert resolve_url(None) == "sqlite:///env.sqlite"


def test_missing_folder_for_sqlite_file_is_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(InvalidInputError, match="does not exist; create it first"):
        open_registry(str(tmp_path / "nope" / "r.sqlite"))


def test_sqlite_pragmas_are_set(sqlite_path: str) -> None:
    registry = open_registry(sqlite_path)
    try:
        with registry.engine.connect() as conn:
            assert conn.exec_driver_sql("PRAGMA foreign_keys").scalar() == 1
            assert conn.exec_driver_sql("PRAGMA journal_mode").scalar() == "wal"
            assert conn.exec_driver_sql("PRAGMA busy_timeout").scalar() == 30000
    finally:
        registry.dispose()
