"""Online backup and restore of SQLite registries through SQLite's backup API (safe while others write)."""

from __future__ import annotations

import os
import sqlite3
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.registry.db import SCHEMA_HEAD, open_registry, resolve_url

SQLITE_HEADER = b"SQLite format 3\x00"


@dataclass(frozen=True)
class BackupSummary:
    """One finished backup or restore: source, destination, schema revision and audit-event count."""

    source: str
    destination: str
    schema: str
    audit_events: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "source": self.source,
            "destination": self.destination,
            "schema": self.schema,
            "audit_events": self.audit_events,
        }


def sqlite_path(db: str | None) -> Path:
    """The file behind --db, or a clear error when the registry is not a SQLite file."""
    url = resolve_url(db)
    if not url.startswith("sqlite:///") or url == "sqlite:///:memory:":
        raise InvalidInputError(
            "backup and restore work on SQLite registry files; for PostgreSQL use `ivdossier export DIR` "
            "or the server's own dump tools."
        )
    return Path(url.split("sqlite:///", 1)[1])


def _inspect(path: Path) -> tuple[str, int]:
    """(schema revision, audit-event count) of a registry file, or InvalidInputError saying why it is not one."""
    try:
        with path.open("rb") as fh:
            header = fh.read(len(SQLITE_HEADER))
    except OSError as exc:
        raise InvalidInputError(f"cannot read {str(path)!r}: {exc.strerror}; check the path.") from exc
    if header != SQLITE_HEADER:
        raise InvalidInputError(
            f"{str(path)!r} is not an SQLite database; pass a file `ivdossier backup` wrote."
        )
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True)
    try:
        check = conn.execute("PRAGMA quick_check").fetchone()
        if not check or check[0] != "ok":
            raise InvalidInputError(f"{str(path)!r} is damaged (SQLite quick_check: {check and check[0]}).")
        row = conn.execute("SELECT version_num FROM alembic_version").fetchone()
        events = conn.execute("SELECT count(*) FROM audit_event").fetchone()[0]
    except sqlite3.DatabaseError as exc:
        raise InvalidInputError(
            f"{str(path)!r} is not an ivdossier registry ({exc}); pass a file `ivdossier backup` wrote."
        ) from exc
    finally:
        conn.close()
    if row is None:
        raise InvalidInputError(f"{str(path)!r} has no schema revision; it is not an ivdossier registry.")
    return str(row[0]), int(events)


def _copy(source: Path, destination: Path) -> None:
    src = sqlite3.connect(str(source), timeout=30)
    dst = sqlite3.connect(str(destination), timeout=30)
    try:
        src.backup(dst)
    finally:
        dst.close()
        src.close()


def _match_page_size(staged: Path, target: Path) -> None:
    """A WAL-mode destination only accepts a backup with its own page size: rewrite the staged copy to match."""
    conn = sqlite3.connect(str(target), timeout=30)
    try:
        size = int(conn.execute("PRAGMA page_size").fetchone()[0])
    finally:
        conn.close()
    conn = sqlite3.connect(str(staged))
    try:
        if int(conn.execute("PRAGMA page_size").fetchone()[0]) != size:
            conn.execute("PRAGMA journal_mode=DELETE")
            conn.execute(f"PRAGMA page_size={size}")
            conn.execute("VACUUM")
    finally:
        conn.close()


def backup_registry(db: str | None, destination: str | Path, *, replace: bool = False) -> BackupSummary:
    """Copy the registry into `destination` as one consistent snapshot, even while others are writing."""
    source = sqlite_path(db)
    dest = Path(destination).expanduser()
    if not source.is_file():
        raise InvalidInputError(f"there is no registry at {str(source)!r}; check --db.")
    if dest.resolve() == source.resolve():
        raise InvalidInputError("the backup file must differ from the registry file; choose another path.")
    if not dest.parent.is_dir():
        raise InvalidInputError(f"the folder {str(dest.parent)!r} does not exist; create it first.")
    if dest.exists() and not replace:
        raise InvalidInputError(f"{str(dest)!r} already exists; choose a new file name or pass --replace.")
    tmp = dest.with_name(f".{dest.name}.partial")
    tmp.unlink(missing_ok=True)
    try:
        _copy(source, tmp)
        schema, events = _inspect(tmp)
        os.replace(tmp, dest)
    finally:
        tmp.unlink(missing_ok=True)
    return BackupSummary(source=str(source), destination=str(dest), schema=schema, audit_events=events)


def restore_registry(source: str | Path, db: str | None, *, replace: bool = False) -> BackupSummary:
    """Replace the registry's content with a backup file (checked first), then upgrade it to the current schema.

    A registry that already holds audit events is only overwritten with `replace`.
    """
    src = Path(source).expanduser()
    target = sqlite_path(db)
    if not src.is_file():
        raise InvalidInputError(f"there is no backup file at {str(src)!r}; check the path.")
    if target.exists() and src.resolve() == target.resolve():
        raise InvalidInputError("the backup file is the registry itself; pass another --db or file.")
    schema, _ = _inspect(src)
    from ivdossier.registry.migrations.runner import HERE

    known = {p.name.split("_", 1)[0] for p in (HERE / "versions").glob("[0-9]*_*.py")}
    if schema not in known:
        raise InvalidInputError(
            f"the backup is at schema {schema}, which this ivdossier does not know (newest {SCHEMA_HEAD}); "
            "restore it with a newer ivdossier."
        )
    if target.exists() and target.stat().st_size > 0:
        _, existing = _inspect(target)
        if existing and not replace:
            raise InvalidInputError(
                f"the registry at {str(target)!r} already holds {existing} audited changes; "
                "pass --replace to overwrite it with the backup."
            )
    if not target.parent.is_dir():
        raise InvalidInputError(f"the folder {str(target.parent)!r} does not exist; create it first.")
    staged = target.with_name(f".{target.name}.restore")
    staged.unlink(missing_ok=True)
    try:
        _copy(src, staged)
        if target.exists() and target.stat().st_size > 0:
            _match_page_size(staged, target)
        try:
            _copy(staged, target)
        except sqlite3.OperationalError as exc:
            raise InvalidInputError(
                f"cannot restore into {str(target)!r} ({exc}); close other programs using the registry and retry."
            ) from exc
    finally:
        staged.unlink(missing_ok=True)
    registry = open_registry(str(target))  # upgrades an older schema
    registry.dispose()
    schema_now, events = _inspect(target)
    return BackupSummary(source=str(src), destination=str(target), schema=schema_now, audit_events=events)
