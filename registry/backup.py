"""Online backup and restore of SQLite registries through SQLite's backup API (safe while others write)."""

from __future__ import annotations

import glob
import os
import sqlite3
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.registry.db import SCHEMA_HEAD, open_registry, resolve_url

SQLITE_HEADER = b"SQLite format 3\x00"


@dataclass(frozen=True)
class BackupSummary:
    """One finished backup or restore: source, destination, schema revision and audit-event count."""

    source: str
    destination: str
    schema: str
    audit_events: int
    unfrozen: tuple[str, ...] = ()  # frozen plans a restore was allowed to unfreeze, change or remove

    def to_dict(self) -> dict[str, Any]:
        return {
            "source": self.source,
            "destination": self.destination,
            "schema": self.schema,
            "audit_events": self.audit_events,
            "unfrozen": list(self.unfrozen),
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
    """Online backup of `source` into `destination`; the copy is left in rollback-journal mode, so closing it
    leaves no -wal or -shm file behind (opening it as a registry switches it back to WAL)."""
    src = sqlite3.connect(f"file:{source}?mode=ro", uri=True, timeout=30)
    dst = sqlite3.connect(str(destination), timeout=30)
    try:
        src.backup(dst)
        dst.execute("PRAGMA journal_mode=DELETE")
    finally:
        dst.close()
        src.close()
    _remove_sidecars(destination)


def _remove_sidecars(path: Path) -> None:
    for suffix in ("-wal", "-shm", "-journal"):
        path.with_name(path.name + suffix).unlink(missing_ok=True)


def _match_page_size(staged: Path, target: Path) -> None:
    """A WAL-mode destination only accepts a backup with its own page size: rewrite the staged copy to match."""
    size = _page_size(target)
    conn = sqlite3.connect(str(staged))
    try:
        if int(conn.execute("PRAGMA page_size").fetchone()[0]) != size:
            conn.execute("PRAGMA journal_mode=DELETE")
            conn.execute(f"PRAGMA page_size={size}")
            conn.execute("VACUUM")
    finally:
        conn.close()


def _page_size(path: Path) -> int:
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30)
    try:
        return int(conn.execute("PRAGMA page_size").fetchone()[0])
    finally:
        conn.close()


def _restore_into(source: Path, target: Path) -> None:
    """Copy `source` over the live `target` in one transaction of the backup API."""
    src = sqlite3.connect(f"file:{source}?mode=ro", uri=True, timeout=30)
    dst = sqlite3.connect(str(target), timeout=30)
    try:
        src.backup(dst)
    finally:
        dst.close()
        src.close()


def _staging_name(target: Path) -> Path:
    return target.with_name(f".{target.name}.restore-{os.getpid()}")


def remove_stale_staging(target: Path) -> int:
    """Delete staging copies that killed restores left beside `target` (their process is gone); returns how many."""
    removed = 0
    if not target.parent.is_dir():
        return 0
    for path in target.parent.glob(f".{glob.escape(target.name)}.restore*"):
        owner = path.name.split(".restore-", 1)[-1].split("-", 1)[0] if ".restore-" in path.name else ""
        if owner.isdigit() and _alive(int(owner)):
            continue  # a restore still running (or this process)
        if path.is_file() or path.is_symlink():
            path.unlink(missing_ok=True)
            removed += 1
    return removed


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:
        return True
    return True


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
    if dest.is_dir():
        raise InvalidInputError(f"{str(dest)!r} is a folder; name the backup file to create.")
    if dest.exists() and not replace:
        raise InvalidInputError(f"{str(dest)!r} already exists; choose a new file name or pass --replace.")
    tmp = dest.with_name(f".{dest.name}.partial")
    tmp.unlink(missing_ok=True)
    _remove_sidecars(tmp)
    try:
        _copy(source, tmp)
        schema, events = _inspect(tmp)
        os.replace(tmp, dest)
    finally:
        tmp.unlink(missing_ok=True)
        _remove_sidecars(tmp)
    return BackupSummary(source=str(source), destination=str(dest), schema=schema, audit_events=events)


@dataclass(frozen=True)
class PlanSeal:
    """A plan's seal as stored in one registry file."""

    slug: str
    state: str
    sha256: str


def _plan_seals(path: Path) -> dict[str, PlanSeal]:
    """uuid -> seal of every plan in a registry file (empty when the file has no plan table)."""
    conn = sqlite3.connect(f"file:{path}?mode=ro", uri=True, timeout=30)
    try:
        rows = conn.execute("SELECT uuid, slug, state, sha256 FROM plan").fetchall()
    except sqlite3.DatabaseError:
        return {}
    finally:
        conn.close()
    return {str(u): PlanSeal(str(slug), str(state), str(sha or "")) for u, slug, state, sha in rows}


def seals_broken_by(backup: Path, target: Path) -> list[str]:
    """Frozen plans of `target` that restoring `backup` would unfreeze, change or remove, as readable notes."""
    if not target.is_file() or target.stat().st_size == 0:
        return []
    after = _plan_seals(backup)
    notes = []
    for uuid, seal in sorted(_plan_seals(target).items(), key=lambda kv: kv[1].slug):
        if seal.state != "frozen":
            continue
        found = after.get(uuid)
        if found is None:
            notes.append(f"plan {seal.slug!r} would disappear (the backup predates it)")
        elif found.state != "frozen":
            notes.append(f"plan {seal.slug!r} would become an editable draft again")
        elif found.sha256 != seal.sha256:
            notes.append(f"plan {seal.slug!r} would carry another seal ({found.sha256[:12]}…)")
    return notes


def restore_registry(
    source: str | Path, db: str | None, *, replace: bool = False, allow_unfreeze: bool = False
) -> BackupSummary:
    """Replace the registry's content with a backup file (checked first), then upgrade it to the current schema.

    A registry that already holds audit events is only overwritten with `replace`; one whose frozen plans the
    backup would unfreeze, change or remove only with `allow_unfreeze` (the summary then names those plans).
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
    unfrozen = seals_broken_by(src, target)
    if unfrozen and not allow_unfreeze:
        raise ConflictError(
            f"restore refused, nothing was changed: {'; '.join(unfrozen[:10])}; a frozen plan is only worth "
            "its seal, so keep the registry, or pass --allow-unfreeze if you mean to undo those seals."
        )
    remove_stale_staging(target)
    source_for_copy = src
    staged: Path | None = None
    try:
        if target.exists() and target.stat().st_size > 0 and _page_size(src) != _page_size(target):
            staged = _staging_name(target)  # a WAL registry only accepts a copy with its own page size
            staged.unlink(missing_ok=True)
            _copy(src, staged)
            _match_page_size(staged, target)
            source_for_copy = staged
        try:
            _restore_into(source_for_copy, target)
        except sqlite3.OperationalError as exc:
            raise InvalidInputError(
                f"cannot restore into {str(target)!r} ({exc}); close other programs using the registry and retry."
            ) from exc
    finally:
        if staged is not None:
            staged.unlink(missing_ok=True)
            _remove_sidecars(staged)
    registry = open_registry(str(target))  # upgrades an older schema
    registry.dispose()
    schema_now, events = _inspect(target)
    return BackupSummary(
        source=str(src),
        destination=str(target),
        schema=schema_now,
        audit_events=events,
        unfrozen=tuple(unfrozen),
    )
