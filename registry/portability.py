"""Export the whole registry as a folder of text files (one per entity, stable bytes) and import it back.

Layout written under the chosen folder:

    manifest.json               format name and version, schema revision, entity counts, SHA-256 of every file
    <kind>/<label>.json         one entity: every column but the integer id, references as UUIDs
    <kind>/_<uuid>.json         the same when the label is not a safe, unique lower-case file name
    audit.jsonl                 the audit trail, one event per line, oldest first

JSON is UTF-8 with sorted keys, two-space indent and a final newline; datetimes are ISO-8601 UTC with
microseconds; references to other entities are `<name>_uuid` fields. Import checks everything first, then
writes in one transaction: it adds what is new, leaves identical entities alone and reports conflicts.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import re
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import Boolean, Column, DateTime, Float, Integer, Table, insert, select, update
from sqlalchemy import select as sa_select
from sqlalchemy.orm import Session
from sqlalchemy.types import JSON

from ivdossier import safefiles
from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.registry import records
from ivdossier.registry.db import SCHEMA_HEAD
from ivdossier.registry.models import (
    CONDITIONS,
    ENTITY_CLASSES,
    LIFECYCLE_STATES,
    LINK_STATES,
    READING_ASPECTS,
    THREAT_KINDS,
    AuditEvent,
    Entity,
)

FORMAT_NAME = "ivdossier-export"
FORMAT_VERSION = 2  # 2: the manifest lists every file with its SHA-256
MANIFEST = "manifest.json"
AUDIT_FILE = "audit.jsonl"
MAX_FILE_BYTES = 50_000_000
MAX_TEXT = 1_000_000  # longest unbounded text field accepted on import
MAX_REPORTED = 20
MAX_ACTION = 32  # width of audit_event.action
ON_CONFLICT = ("stop", "keep-registry", "take-import")
SHA256_RE = re.compile(r"^[0-9a-f]{64}$")
UUID_RE = re.compile(r"^[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}$")
SAFE_NAME_RE = re.compile(r"^[a-z0-9][a-z0-9._-]{0,199}$")
AUDIT_KEYS = (
    "action",
    "actor",
    "after",
    "at",
    "before",
    "entity_kind",
    "entity_label",
    "entity_uuid",
    "reason",
)
CLASSES: dict[str, type[Entity]] = {cls.kind: cls for cls in ENTITY_CLASSES}
# Labels people type and the registry checks as slugs.
SLUG_LABELS = {"program", "instrument", "member"}
# Closed vocabularies worth checking on import (kind -> column -> allowed values).
VOCABULARIES: dict[str, dict[str, tuple[str, ...]]] = {
    "instrument": {"state": LIFECYCLE_STATES},
    "link": {"state": LINK_STATES},
    "threat": {"condition": CONDITIONS + READING_ASPECTS, "threat_kind": THREAT_KINDS},
}


# ---------------------------------------------------------------- encoding


def format_datetime(value: datetime) -> str:
    """ISO-8601 in UTC with microseconds, e.g. 2026-12-02T02:45:14.123456+00:00 (naive values are UTC)."""
    aware = value.replace(tzinfo=UTC) if value.tzinfo is None else value.astimezone(UTC)
    return aware.isoformat(timespec="microseconds")


def parse_datetime(value: Any, *, where: str) -> datetime:
    if not isinstance(value, str):
        raise InvalidInputError(f"{where} must be an ISO-8601 date-time string, got {type(value).__name__}.")
    try:
        parsed = datetime.fromisoformat(value)
    except ValueError as exc:
        raise InvalidInputError(
            f"{where} {value[:40]!r} is not an ISO-8601 date-time; use 2026-01-31T12:00:00+00:00."
        ) from exc
    if parsed.tzinfo is None:
        raise InvalidInputError(f"{where} {value!r} has no time zone; add +00:00 (UTC).")
    return parsed.astimezone(UTC)


def dumps_document(doc: Mapping[str, Any], *, where: str) -> str:
    """One entity file's text: sorted keys, two-space indent, trailing newline."""
    try:
        return json.dumps(doc, sort_keys=True, indent=2, ensure_ascii=False, allow_nan=False) + "\n"
    except ValueError as exc:
        raise InvalidInputError(
            f"{where} holds a NaN or infinite number that JSON cannot carry; store it as the string 'inf' or null."
        ) from exc


def dumps_event(event: Mapping[str, Any]) -> str:
    """One audit line: sorted keys, compact separators, no newline inside."""
    try:
        return json.dumps(event, sort_keys=True, ensure_ascii=False, separators=(",", ":"), allow_nan=False)
    except ValueError as exc:
        raise InvalidInputError(
            f"audit event of {event.get('entity_label')!r} holds a NaN or infinite number; it cannot be exported."
        ) from exc


def _fk_columns(table: Table) -> dict[str, str]:
    """Foreign-key column -> kind of the referenced entity."""
    kinds_by_table = {cls.__tablename__: cls.kind for cls in ENTITY_CLASSES}  # type: ignore[attr-defined]
    out: dict[str, str] = {}
    for col in table.columns:
        for fk in col.foreign_keys:
            out[col.name] = kinds_by_table[fk.column.table.name]
    return out


def _doc_key(column: str, fks: Mapping[str, str]) -> str:
    return column[: -len("_id")] + "_uuid" if column in fks else column


def entity_document(obj: Entity, uuid_of: Mapping[tuple[str, int], str]) -> dict[str, Any]:
    """The exported form of one entity: columns without the integer id, references as UUIDs."""
    table: Table = obj.__table__  # type: ignore[attr-defined]
    fks = _fk_columns(table)
    doc: dict[str, Any] = {}
    for col in table.columns:
        if col.name == "id":
            continue
        value = getattr(obj, col.name)
        if col.name in fks:
            value = None if value is None else uuid_of[(fks[col.name], value)]
        elif isinstance(value, datetime):
            value = format_datetime(value)
        doc[_doc_key(col.name, fks)] = value
    return doc


def event_document(event: AuditEvent) -> dict[str, Any]:
    return {
        "action": event.action,
        "actor": event.actor,
        "after": event.after,
        "at": format_datetime(event.at),
        "before": event.before,
        "entity_kind": event.entity_kind,
        "entity_label": event.entity_label,
        "entity_uuid": event.entity_uuid,
        "reason": event.reason,
    }


def file_name(label: str, uuid: str) -> str:
    """A label that is already a safe lower-case file name, else `_<uuid>` (labels never start with '_')."""
    lowered = label.lower()
    if SAFE_NAME_RE.match(lowered) and ".." not in lowered:
        return lowered
    return "_" + (uuid if UUID_RE.match(uuid) else re.sub(r"[^0-9a-f-]", "", uuid.lower())[:36] or "entity")


def _names_for(entities: Sequence[Entity]) -> list[str]:
    names = [file_name(e.label, e.uuid) for e in entities]
    seen: dict[str, int] = {}
    for n in names:
        seen[n] = seen.get(n, 0) + 1
    # Labels that collide once lower-cased fall back to their UUID, so no two files share a name.
    return [n if seen[n] == 1 else file_name("", e.uuid) for n, e in zip(names, entities, strict=True)]


# ---------------------------------------------------------------- export


@dataclass(frozen=True)
class ExportSummary:
    """What an export wrote: entity counts per kind and how many files changed on disk."""

    directory: str
    counts: dict[str, int]
    audit_events: int
    written: int
    unchanged: int
    removed: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "directory": self.directory,
            "counts": dict(self.counts),
            "audit_events": self.audit_events,
            "written": self.written,
            "unchanged": self.unchanged,
            "removed": self.removed,
        }


def _repeatable_read(session: Session) -> None:
    """Read the whole registry from one snapshot (SQLite read transactions already are one)."""
    if session.get_bind().dialect.name == "postgresql":
        session.connection(execution_options={"isolation_level": "REPEATABLE READ"})


def render_export(session: Session) -> dict[str, str]:
    """The export as relative path -> file text, read in one snapshot."""
    _repeatable_read(session)
    loaded: dict[str, list[Entity]] = {}
    uuid_of: dict[tuple[str, int], str] = {}
    for cls in ENTITY_CLASSES:
        rows = list(session.scalars(select(cls).order_by(cls.uuid)))  # type: ignore[arg-type]
        loaded[cls.kind] = rows
        uuid_of.update(((cls.kind, r.id), r.uuid) for r in rows)
    files: dict[str, str] = {}
    for kind, rows in loaded.items():
        for name, obj in zip(_names_for(rows), rows, strict=True):
            files[f"{kind}/{name}.json"] = dumps_document(
                entity_document(obj, uuid_of), where=f"{kind} {obj.label!r}"
            )
    events = session.scalars(select(AuditEvent).order_by(AuditEvent.at, AuditEvent.id))  # type: ignore[arg-type]
    lines = [dumps_event(event_document(e)) + "\n" for e in events]
    files[AUDIT_FILE] = "".join(lines)
    manifest = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "schema": SCHEMA_HEAD,
        "counts": {kind: len(rows) for kind, rows in loaded.items()},
        "audit_events": len(lines),
        "files": {rel: sha256_hex(text.encode("utf-8")) for rel, text in sorted(files.items())},
    }
    files[MANIFEST] = dumps_document(manifest, where="manifest")
    return files


def _is_old_temporary(rel: str) -> bool:
    """A temporary an earlier version of export left inside the folder (`.name.tmp`): ours, dropped on swap."""
    name = rel.rsplit("/", 1)[-1]
    return name.startswith(".") and name.endswith(".tmp")


def _existing_export_files(root: Path) -> set[str]:
    """Files of an earlier export in root. Every entry is checked (dot-entries too) without following links:
    anything that is not export content, version control or an old temporary is refused, naming it."""
    if not os.path.lexists(root):
        return set()
    if root.is_symlink() or not root.is_dir():
        raise InvalidInputError(
            f"{str(root)!r} is not a folder; choose a new or empty folder for the export."
        )
    entries = [
        e
        for e in safefiles.scan_tree(root)
        if e.rel.split("/")[0] not in safefiles.PRESERVED
        and e.rel.rsplit("/", 1)[-1] not in safefiles.CLUTTER
    ]
    if not entries:
        return set()
    kinds = {e.rel: e.kind for e in entries}
    manifest = safefiles.read_regular(root / MANIFEST) if kinds.get(MANIFEST) == "file" else None
    if manifest is None or _manifest_format(manifest) != FORMAT_NAME:
        shown = ", ".join(sorted(e.rel for e in entries if "/" not in e.rel)[:5])
        raise InvalidInputError(
            f"{str(root)!r} already holds files that are not an ivdossier export ({shown}); "
            "choose a new or empty folder."
        )
    found: set[str] = set()
    strays: list[str] = []
    for e in entries:
        top, _, rest = e.rel.partition("/")
        if e.kind == "file" and _is_old_temporary(e.rel):
            continue
        if e.kind == "link":
            strays.append(f"{e.rel} (a symbolic link)")
        elif e.rel in (MANIFEST, AUDIT_FILE) and e.kind == "file":
            found.add(e.rel)
        elif top in CLASSES and not rest and e.kind == "dir":
            continue
        elif top in CLASSES and rest and "/" not in rest and e.kind == "file" and rest.endswith(".json"):
            found.add(e.rel)
        else:
            strays.append(e.rel)
    if strays:
        raise InvalidInputError(
            f"{str(root)!r} holds an earlier export plus other content ({', '.join(sorted(strays)[:5])}); "
            "move that content away or choose another folder."
        )
    return found


def _manifest_format(data: bytes) -> str | None:
    try:
        parsed = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        return None
    return parsed.get("format") if isinstance(parsed, dict) else None


def write_export(files: Mapping[str, str], directory: str | Path) -> tuple[int, int, int]:
    """Replace `directory` with the rendered files in one swap; returns (written, unchanged, removed).

    The new tree is staged in a sibling folder and swapped in with one rename: an interrupted export leaves
    the old export or the new one, and version-control entries (.git) are carried over.
    """
    root = Path(directory).expanduser().resolve()
    safefiles.clean_stale(root)
    old = _existing_export_files(root)
    change = safefiles.replace_tree(
        root, {rel: text.encode("utf-8") for rel, text in files.items()}, allowed_old=sorted(old)
    )
    return change.written, change.unchanged, change.removed


def export_registry(session: Session, directory: str | Path) -> ExportSummary:
    """Write the whole registry under `directory` (new, empty, or holding an earlier export)."""
    files = render_export(session)
    written, same, removed = write_export(files, directory)
    manifest = json.loads(files[MANIFEST])
    return ExportSummary(
        directory=str(Path(directory)),
        counts={k: v for k, v in manifest["counts"].items() if v},
        audit_events=manifest["audit_events"],
        written=written,
        unchanged=same,
        removed=removed,
    )


# ---------------------------------------------------------------- reading an export


@dataclass
class Problems:
    """Validation problems gathered over the whole export, reported together."""

    items: list[str] = field(default_factory=list)

    def add(self, message: str) -> None:
        # File names and values come from the folder: escape anything unprintable so the error stays one line.
        self.items.append("".join(c if c.isprintable() else repr(c)[1:-1] for c in message))

    def raise_if_any(self, directory: Path) -> None:
        if not self.items:
            return
        shown = "; ".join(self.items[:MAX_REPORTED])
        more = f" (and {len(self.items) - MAX_REPORTED} more)" if len(self.items) > MAX_REPORTED else ""
        raise InvalidInputError(
            f"the export in {str(directory)!r} cannot be imported, nothing was written: {shown}{more}; "
            "fix these files and import again."
        )


def _no_constants(name: str) -> Any:
    raise ValueError(f"{name} is not valid JSON")


def _unique_pairs(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            raise ValueError(f"key {key!r} appears twice")
        out[key] = value
    return out


def _finite_float(text: str) -> float:
    value = float(text)
    if not math.isfinite(value):
        raise ValueError(f"number {text[:30]} is too large for a float")
    return value


def load_json_text(text: str) -> Any:
    """Strict JSON: no NaN/Infinity (spelled out or overflowing), no repeated keys."""
    return json.loads(
        text, parse_constant=_no_constants, parse_float=_finite_float, object_pairs_hook=_unique_pairs
    )


def _decode(data: bytes, rel: str, problems: Problems) -> str | None:
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        problems.add(f"{rel} is not UTF-8 text ({exc.reason} at byte {exc.start})")
    return None


def _parse_json_bytes(data: bytes, rel: str, problems: Problems) -> Any:
    text = _decode(data, rel, problems)
    if text is None:
        return None
    try:
        return load_json_text(text)
    except (ValueError, RecursionError) as exc:
        problems.add(f"{rel} is not valid JSON ({str(exc)[:120]})")
        return None


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _json_unstorable(value: Any, depth: int = 0) -> bool:
    """True when a JSON value holds text no backend can store (NUL, lone surrogates) or nests absurdly deep."""
    if depth > 200:
        return True
    if isinstance(value, str):
        return "\x00" in value or not records.is_utf8(value)
    if isinstance(value, dict):
        return any(_json_unstorable(k, depth + 1) or _json_unstorable(v, depth + 1) for k, v in value.items())
    if isinstance(value, list):
        return any(_json_unstorable(v, depth + 1) for v in value)
    return False


@dataclass
class Incoming:
    """One validated entity from the export: its kind, file, plain column values and referenced UUIDs."""

    kind: str
    rel: str
    uuid: str
    label: str
    doc: dict[str, Any]
    values: dict[str, Any]
    refs: dict[str, str | None]  # fk column -> uuid


def _check_value(col: Column[Any], value: Any, where: str, problems: Problems) -> Any:
    """Check one plain column value against its type; returns the value to store."""
    if value is None:
        if not col.nullable and not isinstance(col.type, JSON):
            problems.add(f"{where} must not be null")
        return value
    ctype = col.type
    if isinstance(getattr(ctype, "impl", ctype), DateTime):
        try:
            return parse_datetime(value, where=where)
        except InvalidInputError as exc:
            problems.add(str(exc).rstrip("."))
            return None
    if isinstance(ctype, Boolean):
        if not isinstance(value, bool):
            problems.add(f"{where} must be true or false")
        return value
    if isinstance(ctype, Integer):
        if not isinstance(value, int) or isinstance(value, bool) or abs(value) > 2**62:
            problems.add(f"{where} must be a whole number")
        return value
    if isinstance(ctype, Float):
        if not isinstance(value, int | float) or isinstance(value, bool):
            problems.add(f"{where} must be a number")
        return value
    if isinstance(ctype, JSON):
        if _json_unstorable(value):
            problems.add(
                f"{where} contains a NUL character, text that is not UTF-8, or nests deeper than 200 levels"
            )
        return value
    if not isinstance(value, str):
        problems.add(f"{where} must be a string, got {type(value).__name__}")
        return value
    limit = getattr(ctype, "length", None) or MAX_TEXT
    if "\x00" in value:
        problems.add(f"{where} contains a NUL character")
    elif not records.is_utf8(value):
        problems.add(f"{where} contains text that is not UTF-8 (a lone surrogate escape)")
    elif len(value) > limit:
        problems.add(f"{where} is {len(value):,} characters long; the limit is {limit:,}")
    return value


def _check_label(kind: str, label: Any, where: str, problems: Problems) -> None:
    if not isinstance(label, str) or not label:
        problems.add(f"{where} needs a non-empty name")
        return
    if kind in SLUG_LABELS:
        try:
            records.check_slug(label, what=kind)
        except InvalidInputError as exc:
            problems.add(f"{where}: {str(exc).rstrip('.')}")


def parse_entity(kind: str, rel: str, data: Any, problems: Problems) -> Incoming | None:
    """Validate one entity document; returns None (with problems recorded) when it cannot be used."""
    cls = CLASSES[kind]
    table: Table = cls.__table__  # type: ignore[attr-defined]
    fks = _fk_columns(table)
    if not isinstance(data, dict):
        problems.add(f"{rel} must hold a JSON object")
        return None
    expected = {_doc_key(c.name, fks): c for c in table.columns if c.name != "id"}
    missing = sorted(set(expected) - set(data))
    unknown = sorted(set(data) - set(expected))
    if missing or unknown:
        parts = ([f"missing {', '.join(missing)}"] if missing else []) + (
            [f"unknown {', '.join(u[:40] for u in unknown[:5])}"] if unknown else []
        )
        problems.add(f"{rel} has the wrong fields ({'; '.join(parts)})")
        return None
    before = len(problems.items)
    uuid = data["uuid"]
    if not isinstance(uuid, str) or not UUID_RE.match(uuid):
        problems.add(f"{rel} uuid must be a lower-case UUID like 1b4e28ba-2fa1-11d2-883f-0016d3cca427")
    label = data.get(cls.label_field)
    _check_label(kind, label, rel, problems)
    values: dict[str, Any] = {}
    refs: dict[str, str | None] = {}
    for key, col in expected.items():
        value = data[key]
        where = f"{rel} field {key}"
        if col.name in fks:
            if value is None and col.nullable:
                refs[col.name] = None
            elif not isinstance(value, str) or not UUID_RE.match(value):
                problems.add(f"{where} must be the UUID of a {fks[col.name]}")
            else:
                refs[col.name] = value
            continue
        values[col.name] = _check_value(col, value, where, problems)
    version = data["version"]
    if isinstance(version, int) and not isinstance(version, bool) and version < 1:
        problems.add(f"{rel} field version must be 1 or more")
    for column, allowed in VOCABULARIES.get(kind, {}).items():
        if data[column] not in allowed:
            problems.add(
                f"{rel} field {column} {str(data[column])[:40]!r} is not one of {', '.join(allowed)}"
            )
    if kind == "rating":
        for column in ("likelihood", "severity"):
            if not (isinstance(data[column], int) and 1 <= data[column] <= 5):
                problems.add(f"{rel} field {column} must be a whole number from 1 to 5")
    if len(problems.items) > before:
        return None
    return Incoming(kind=kind, rel=rel, uuid=uuid, label=str(label), doc=data, values=values, refs=refs)


def parse_event(line_no: int, data: Any, problems: Problems) -> dict[str, Any] | None:
    where = f"{AUDIT_FILE} line {line_no}"
    if not isinstance(data, dict) or set(data) != set(AUDIT_KEYS):
        problems.add(f"{where} must be an object with exactly the keys {', '.join(AUDIT_KEYS)}")
        return None
    before = len(problems.items)
    table: Table = AuditEvent.__table__  # type: ignore[attr-defined]
    values: dict[str, Any] = {}
    for key in AUDIT_KEYS:
        values[key] = _check_value(table.c[key], data[key], f"{where} field {key}", problems)
    for key in ("before", "after"):
        if data[key] is not None and not isinstance(data[key], dict):
            problems.add(f"{where} field {key} must be an object or null")
    if data["entity_kind"] not in CLASSES:
        problems.add(f"{where} field entity_kind {str(data['entity_kind'])[:40]!r} is not a kind of entity")
    action = data["action"]
    if isinstance(action, str) and len(imported_action(action)) > MAX_ACTION:
        problems.add(
            f"{where} field action {action[:40]!r} is longer than {MAX_ACTION - len(IMPORTED_PREFIX)} characters"
        )
    if len(problems.items) > before:
        return None
    return values


@dataclass(frozen=True)
class ExportContent:
    """A validated export folder: entities in insertion order and the audit events with their canonical lines."""

    directory: Path
    entities: tuple[Incoming, ...]
    events: tuple[tuple[str, dict[str, Any]], ...]


def _read_folder(root: Path, problems: Problems) -> dict[str, bytes]:
    """Every regular file of the export folder (relative path -> bytes), read without following links; links,
    folders in the wrong place and unexpected entries are problems."""
    found: dict[str, bytes] = {}
    for e in safefiles.scan_tree(root):
        top, _, rest = e.rel.partition("/")
        if top in safefiles.PRESERVED or e.rel.rsplit("/", 1)[-1] in safefiles.CLUTTER:
            continue
        if e.kind == "link":
            problems.add(f"{e.rel[:80]} is a symbolic link; an export holds plain files only")
        elif e.kind == "dir" and top in CLASSES and not rest:
            continue
        elif e.kind != "file":
            problems.add(
                f"{e.rel[:80]!r} is not part of an export (expected {MANIFEST}, {AUDIT_FILE} or kind folders)"
            )
        elif e.rel in (MANIFEST, AUDIT_FILE) or (
            top in CLASSES and "/" not in rest and rest.endswith(".json")
        ):
            data = safefiles.read_regular(root / e.rel, MAX_FILE_BYTES + 1)
            if data is None:
                problems.add(f"{e.rel[:80]} cannot be read as a plain file")
            elif len(data) > MAX_FILE_BYTES:
                problems.add(f"{e.rel[:80]} is larger than {MAX_FILE_BYTES:,} bytes")
            else:
                found[e.rel] = data
        elif top in CLASSES:
            problems.add(f"{e.rel[:80]} is not an entity file (plain <name>.json expected)")
        else:
            problems.add(
                f"{e.rel[:80]!r} is not part of an export (expected {MANIFEST}, {AUDIT_FILE} or kind folders)"
            )
    return found


def _check_hashes(manifest: Mapping[str, Any], files: Mapping[str, bytes], problems: Problems) -> None:
    """Every file must be listed in the manifest with its SHA-256, and every listed file present and equal:
    a folder mixing two exports, or edited after the export, is refused with the files named."""
    listed = manifest.get("files")
    if not isinstance(listed, dict) or not all(
        isinstance(k, str) and isinstance(v, str) and SHA256_RE.match(v) for k, v in listed.items()
    ):
        problems.add(f"{MANIFEST} has no valid per-file SHA-256 list (files); export the registry again")
        return
    present = set(files) - {MANIFEST}
    changed = sorted(rel for rel in present & set(listed) if sha256_hex(files[rel]) != listed[rel])
    unlisted = sorted(present - set(listed))
    missing = sorted(set(listed) - present)
    for label, names in (
        ("differ from the SHA-256 the manifest records (edited, or mixed from another export)", changed),
        ("are not listed in the manifest", unlisted),
        ("are listed in the manifest but missing", missing),
    ):
        if names:
            shown = ", ".join(n[:80] for n in names[:10])
            more = f" and {len(names) - 10} more" if len(names) > 10 else ""
            problems.add(f"{len(names)} file{'s' if len(names) != 1 else ''} {label}: {shown}{more}")


def read_export(directory: str | Path) -> ExportContent:
    """Read and validate an export folder completely (no database access); InvalidInputError lists problems."""
    root = Path(directory).expanduser()
    if not root.is_dir():
        raise InvalidInputError(f"{str(root)!r} is not a folder; pass the folder `ivdossier export` wrote.")
    problems = Problems()
    raw = safefiles.read_regular(root / MANIFEST, MAX_FILE_BYTES + 1)
    manifest = _parse_json_bytes(raw, MANIFEST, problems) if raw is not None else None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT_NAME:
        raise InvalidInputError(
            f"{str(root)!r} has no ivdossier export manifest ({MANIFEST}); pass the folder `ivdossier export` wrote."
        )
    if manifest.get("format_version") != FORMAT_VERSION:
        raise InvalidInputError(
            f"the export uses format version {manifest.get('format_version')!r}; this ivdossier reads version "
            f"{FORMAT_VERSION}; export it again with this version."
        )
    if manifest.get("schema") != SCHEMA_HEAD:
        raise InvalidInputError(
            f"the export was written at schema {manifest.get('schema')!r}, this registry is at {SCHEMA_HEAD}; "
            "open the source registry with this version of ivdossier and export it again."
        )
    files = _read_folder(root, problems)
    _check_hashes(manifest, files, problems)
    raw_counts = manifest.get("counts")
    counts: dict[str, Any] = raw_counts if isinstance(raw_counts, dict) else {}
    entities: list[Incoming] = []
    for kind in CLASSES:
        mine = sorted(rel for rel in files if rel.startswith(kind + "/"))
        if len(mine) != counts.get(kind, 0):
            problems.add(
                f"the manifest counts {counts.get(kind, 0)} {kind} files but the folder has {len(mine)}"
            )
        for rel in mine:
            data = _parse_json_bytes(files[rel], rel, problems)
            if data is not None:
                parsed = parse_entity(kind, rel, data, problems)
                if parsed is not None:
                    entities.append(parsed)
    events: list[tuple[str, dict[str, Any]]] = []
    if AUDIT_FILE not in files:
        problems.add(f"{AUDIT_FILE} is missing")
    else:
        text = _decode(files[AUDIT_FILE], AUDIT_FILE, problems) or ""
        lines = text.split("\n")
        if lines and lines[-1] == "":
            lines.pop()
        for n, line in enumerate(lines, start=1):
            try:
                data = load_json_text(line)
            except (ValueError, RecursionError) as exc:
                problems.add(f"{AUDIT_FILE} line {n} is not valid JSON ({str(exc)[:80]})")
                continue
            values = parse_event(n, data, problems)
            if values is not None:
                events.append((dumps_event(data), values))
        if len(lines) != manifest.get("audit_events"):
            problems.add(
                f"the manifest counts {manifest.get('audit_events')} audit events but {AUDIT_FILE} has {len(lines)}"
            )
    _check_uniqueness(entities, problems)
    problems.raise_if_any(root)
    order = {cls.kind: i for i, cls in enumerate(ENTITY_CLASSES)}
    entities.sort(key=lambda e: (order[e.kind], e.uuid))
    return ExportContent(directory=root, entities=tuple(entities), events=tuple(events))


def _check_uniqueness(entities: Iterable[Incoming], problems: Problems) -> None:
    by_uuid: dict[str, str] = {}
    by_label: dict[tuple[str, str], str] = {}
    for e in entities:
        if e.uuid in by_uuid:
            problems.add(f"{e.rel} repeats the uuid of {by_uuid[e.uuid]}")
        by_uuid.setdefault(e.uuid, e.rel)
        if (e.kind, e.label) in by_label:
            problems.add(f"{e.rel} repeats the name {e.label[:40]!r} of {by_label[(e.kind, e.label)]}")
        by_label.setdefault((e.kind, e.label), e.rel)


# ---------------------------------------------------------------- import


@dataclass(frozen=True)
class ImportConflict:
    """One entity the import cannot apply as it stands."""

    kind: str
    label: str
    uuid: str
    reason: str

    def to_dict(self) -> dict[str, Any]:
        return {"kind": self.kind, "label": self.label, "uuid": self.uuid, "reason": self.reason}

    def describe(self) -> str:
        return f"{self.kind} {self.label[:60]!r} ({self.uuid}): {self.reason}"


@dataclass(frozen=True)
class ImportReport:
    """Per kind, how many entities were added, replaced by the import, kept as in the registry or unchanged."""

    added: dict[str, int]
    replaced: dict[str, int]
    kept: dict[str, int]
    unchanged: dict[str, int]
    audit_events_added: int
    conflicts: tuple[ImportConflict, ...]
    dry_run: bool

    def to_dict(self) -> dict[str, Any]:
        return {
            "added": dict(self.added),
            "replaced": dict(self.replaced),
            "kept": dict(self.kept),
            "unchanged": dict(self.unchanged),
            "audit_events_added": self.audit_events_added,
            "conflicts": [c.to_dict() for c in self.conflicts],
            "dry_run": self.dry_run,
        }


DomainCheck = Callable[[Sequence["Incoming"]], list[str]]
IMPORTED_PREFIX = "imported:"


def imported_action(action: str) -> str:
    """The action under which another registry's audit event is kept here: history, never this registry's
    own act (so an imported `sealed` event can never pass for this registry's seal)."""
    return action if action.startswith(IMPORTED_PREFIX) else IMPORTED_PREFIX + action


def _event_identity(doc: Mapping[str, Any]) -> str:
    """An audit event's canonical line with the import mark removed: the same event, wherever it was recorded."""
    action = str(doc["action"])
    plain = action[len(IMPORTED_PREFIX) :] if action.startswith(IMPORTED_PREFIX) else action
    return dumps_event({**doc, "action": plain})


def _frozen_plan_refs(entities: Iterable[Entity]) -> dict[str, list[str]]:
    """UUID of each frozen plan and of each program or instrument whose name a frozen plan's seal covers ->
    the slugs of those plans."""
    plans = [e for e in entities if e.kind == "plan" and getattr(e, "state", "") == "frozen"]
    by_id = {(e.kind, e.id): e.uuid for e in entities if e.kind in ("program", "instrument")}
    out: dict[str, list[str]] = {}
    for p in plans:
        out.setdefault(p.uuid, []).append(p.label)
        for kind, column in (("program", "program_id"), ("instrument", "instrument_id")):
            ref = by_id.get((kind, getattr(p, column, None)))
            if ref is not None:
                out.setdefault(ref, []).append(p.label)
    return out


def _builtin_aliases(
    entities: Sequence[Incoming], local: Mapping[str, Entity], local_labels: Mapping[tuple[str, str], str]
) -> dict[str, str]:
    """Incoming built-in threats that this registry holds under another UUID (each registry loads the shipped
    catalogue itself): incoming UUID -> this registry's UUID, matched by code."""
    out: dict[str, str] = {}
    for e in entities:
        if e.kind != "threat" or e.values.get("origin") != "builtin" or e.uuid in local:
            continue
        holder = local_labels.get(("threat", e.label))
        if holder is not None and getattr(local[holder], "origin", None) == "builtin":
            out[e.uuid] = holder
    return out


def _aliased(e: Incoming, alias: Mapping[str, str]) -> Incoming:
    """The entity with references to aliased built-in threats pointing at this registry's copies."""
    refs = {c: alias.get(r, r) if r is not None else None for c, r in e.refs.items()}
    doc = {k: alias.get(v, v) if k.endswith("_uuid") and isinstance(v, str) else v for k, v in e.doc.items()}
    values = dict(e.values)
    if e.kind == "comment" and values.get("entity_uuid") in alias:
        values["entity_uuid"] = alias[values["entity_uuid"]]
    if refs == e.refs and doc == e.doc and values == e.values:
        return e
    return replace(e, refs=refs, doc=doc, values=values)


def _without_bookkeeping(doc: Mapping[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in doc.items() if k not in ("uuid", "created_at", "updated_at", "version")}


def _sealed_by(mine: Entity, incoming: Incoming, frozen_refs: Mapping[str, list[str]]) -> str | None:
    """Why replacing `mine` with the incoming copy would alter a frozen plan, or None."""
    plans = frozen_refs.get(mine.uuid)
    if not plans:
        return None
    names = ", ".join(repr(p) for p in sorted(set(plans)))
    if mine.kind == "plan":
        return f"plan {names} is frozen; an import cannot change or unfreeze it"
    if mine.label != incoming.label:
        return f"renaming it would change the sealed document of frozen plan {names}"
    return None


def _bump(counter: dict[str, int], kind: str) -> None:
    counter[kind] = counter.get(kind, 0) + 1


def import_registry(
    session: Session,
    content: ExportContent,
    *,
    actor: str,
    on_conflict: str = "stop",
    dry_run: bool = False,
    check_domain: DomainCheck | None = None,
) -> ImportReport:
    """Merge a validated export into the registry by UUID, inside the caller's write transaction.

    New entities are added with their exported history (marked as imported). An entity whose UUID exists with
    other content is a conflict: `stop` refuses the whole import, `keep-registry` leaves the registry's copy,
    `take-import` replaces it (at a new version, audited as an import by `actor`). A new UUID whose name is taken
    by another entity is always refused, and so is any change to a frozen plan (or to the names its seal
    covers), whatever the flag. `check_domain` applies the rules of the commands that create entities (the
    catalogue's rules for threats live outside this layer; `ivdossier.workflows.import_checks` passes them).
    With `dry_run` the report is computed and nothing is written.
    """
    if on_conflict not in ON_CONFLICT:
        raise InvalidInputError(
            f"--on-conflict {on_conflict!r} is not known; use one of: {', '.join(ON_CONFLICT)}."
        )
    uuid_of: dict[tuple[str, int], str] = {}
    id_of: dict[tuple[str, str], int] = {}
    local: dict[str, Entity] = {}
    local_labels: dict[tuple[str, str], str] = {}
    for cls in ENTITY_CLASSES:
        for obj in session.scalars(select(cls)):
            uuid_of[(cls.kind, obj.id)] = obj.uuid
            id_of[(cls.kind, obj.uuid)] = obj.id
            local[obj.uuid] = obj
            local_labels[(cls.kind, obj.label)] = obj.uuid
    incoming_kind = {e.uuid: e.kind for e in content.entities}
    frozen_refs = _frozen_plan_refs(local.values())
    frozen_hits: list[str] = []
    conflicts: list[ImportConflict] = []
    problems = Problems()
    plan: list[tuple[str, Incoming]] = []  # ("add" | "replace", entity)
    added: dict[str, int] = {}
    replaced: dict[str, int] = {}
    kept: dict[str, int] = {}
    unchanged: dict[str, int] = {}
    alias = _builtin_aliases(content.entities, local, local_labels)
    for original in content.entities:
        e = _aliased(original, alias) if alias else original
        if e.uuid in alias:
            # The same built-in catalogue entry under this registry's own UUID: never a conflict; the registry's
            # copy stays (`init` refreshes built-ins from the shipped catalogue).
            same = _without_bookkeeping(
                entity_document(local[alias[e.uuid]], uuid_of)
            ) == _without_bookkeeping(e.doc)
            _bump(unchanged if same else kept, e.kind)
            continue
        table: Table = CLASSES[e.kind].__table__  # type: ignore[attr-defined]
        fks = _fk_columns(table)
        for column, ref in e.refs.items():
            if ref is None:
                continue
            target_kind = fks[column]
            found = incoming_kind.get(ref) or (local[ref].kind if ref in local else None)
            if found != target_kind:
                problems.add(
                    f"{e.rel} field {_doc_key(column, fks)} names no {target_kind} in the export or registry"
                )
        if (
            e.kind == "comment"
            and e.values["entity_uuid"] not in incoming_kind
            and e.values["entity_uuid"] not in local
        ):
            problems.add(
                f"{e.rel} comments on {e.values['entity_uuid']!r}, which is in neither the export nor the registry"
            )
        mine = local.get(e.uuid)
        if mine is None:
            holder = local_labels.get((e.kind, e.label))
            if holder is not None:
                conflicts.append(
                    ImportConflict(
                        e.kind,
                        e.label,
                        e.uuid,
                        f"the registry has another {e.kind} of this name (uuid {holder}); rename one of them",
                    )
                )
            else:
                plan.append(("add", e))
                _bump(added, e.kind)
            continue
        if mine.kind != e.kind:
            problems.add(f"{e.rel} reuses the uuid of a {mine.kind} in the registry")
            continue
        if entity_document(mine, uuid_of) == e.doc:
            _bump(unchanged, e.kind)
            continue
        sealed = _sealed_by(mine, e, frozen_refs)
        if sealed is not None and on_conflict != "keep-registry":
            conflicts.append(ImportConflict(e.kind, e.label, e.uuid, sealed))
            frozen_hits.append(e.label)
            continue
        if on_conflict == "stop":
            conflicts.append(
                ImportConflict(
                    e.kind,
                    e.label,
                    e.uuid,
                    f"differs from the registry (registry version {mine.version}, export version {e.doc['version']})",
                )
            )
        elif on_conflict == "keep-registry":
            _bump(kept, e.kind)
        else:
            plan.append(("replace", e))
            _bump(replaced, e.kind)
    if check_domain is not None:
        for message in check_domain([e for _, e in plan]):
            problems.add(message)
    problems.raise_if_any(content.directory)
    if frozen_hits and not dry_run:
        shown = "; ".join(c.describe() for c in conflicts if c.label in frozen_hits)
        raise ConflictError(
            f"import refused, nothing was written: it would change what a frozen plan sealed: {shown[:2000]}; "
            "a frozen plan cannot be changed or unfrozen, draft a new plan or import without those entities."
        )
    if conflicts and not dry_run:
        shown = "; ".join(c.describe() for c in conflicts[:MAX_REPORTED])
        more = f" (and {len(conflicts) - MAX_REPORTED} more)" if len(conflicts) > MAX_REPORTED else ""
        hint = (
            "rerun with --on-conflict keep-registry or take-import, or rename the clashing entities"
            if on_conflict == "stop"
            else "rename the clashing entities"
        )
        raise ConflictError(
            f"import refused, nothing was written: {len(conflicts)} conflicting "
            f"{'entity' if len(conflicts) == 1 else 'entities'}: {shown}{more}; {hint}."
        )
    known_events = {_event_identity(event_document(ev)) for ev in session.scalars(select(AuditEvent))}
    new_events: list[dict[str, Any]] = []
    for _, values in content.events:
        identity = _event_identity({**values, "at": format_datetime(values["at"])})
        if identity not in known_events:
            known_events.add(identity)
            new_events.append({**values, "action": imported_action(values["action"])})
    report = ImportReport(
        added=added,
        replaced=replaced,
        kept=kept,
        unchanged=unchanged,
        audit_events_added=len(new_events),
        conflicts=tuple(conflicts),
        dry_run=dry_run,
    )
    if dry_run:
        return report
    _apply(session, plan, new_events, local, id_of, uuid_of, actor=actor)
    return report


def _row_values(e: Incoming, id_of: Mapping[tuple[str, str], int]) -> dict[str, Any]:
    table: Table = CLASSES[e.kind].__table__  # type: ignore[attr-defined]
    fks = _fk_columns(table)
    values = dict(e.values)
    for column, ref in e.refs.items():
        values[column] = None if ref is None else id_of[(fks[column], ref)]
    return values


def _apply(
    session: Session,
    plan: Sequence[tuple[str, Incoming]],
    events: Sequence[dict[str, Any]],
    local: Mapping[str, Entity],
    id_of: dict[tuple[str, str], int],
    uuid_of: Mapping[tuple[str, int], str],
    *,
    actor: str,
) -> None:
    """Write the planned rows kind by kind (parents first), then the new audit events."""
    for cls in ENTITY_CLASSES:
        table: Table = cls.__table__  # type: ignore[attr-defined]
        mine = [(action, e) for action, e in plan if e.kind == cls.kind]
        adds = [_row_values(e, id_of) for action, e in mine if action == "add"]
        if adds:
            session.connection().execute(insert(table), adds)
            uuids = [row["uuid"] for row in adds]
            for start in range(0, len(uuids), 500):
                chunk = uuids[start : start + 500]
                for ident, uuid in session.connection().execute(
                    sa_select(table.c.id, table.c.uuid).where(table.c.uuid.in_(chunk))
                ):
                    id_of[(cls.kind, uuid)] = ident
        for action, e in mine:
            if action != "replace":
                continue
            current = local[e.uuid]
            before = entity_document(current, uuid_of)
            values = _row_values(e, id_of)
            values["version"] = max(current.version, int(e.doc["version"])) + 1
            session.connection().execute(update(table).where(table.c.id == current.id).values(**values))
            changed = sorted(
                k for k in e.doc if k not in ("version", "updated_at") and e.doc[k] != before.get(k)
            )
            session.add(
                AuditEvent(
                    actor=actor,
                    action="import",
                    entity_kind=e.kind,
                    entity_uuid=e.uuid,
                    entity_label=e.label[:300],
                    before={k: before.get(k) for k in changed},
                    after={k: e.doc[k] for k in changed},
                    reason="replaced by an imported export (--on-conflict take-import)",
                )
            )
    if events:
        session.connection().execute(insert(AuditEvent.__table__), list(events))  # type: ignore[attr-defined]
    session.flush()
