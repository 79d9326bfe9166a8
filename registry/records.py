"""Generic reads and audited writes shared by every entity: lookup by slug, create, edit, snapshot."""

from __future__ import annotations

import difflib
import getpass
import os
import re
import unicodedata
from collections.abc import Mapping
from datetime import datetime
from pathlib import Path
from typing import Any, TypeVar

from sqlalchemy import select
from sqlalchemy.orm import Session
from sqlalchemy.orm.exc import StaleDataError

from ivdossier.errors import ConflictError, InvalidInputError, NotFoundError
from ivdossier.registry.models import AuditEvent, Entity, utcnow
from ivdossier.safefiles import read_bounded_text

E = TypeVar("E", bound=Entity)

TEXT_LIMIT = 100_000  # characters of one free-text field (claims, arguments, notes, comments)
SLUG_RE = re.compile(r"^[a-z0-9][a-z0-9-]{0,63}$")
ENV_USER = "IVDOSSIER_USER"
# Columns that are bookkeeping, not content: left out of audit before/after diffs.
BOOKKEEPING = {"id", "created_at", "updated_at", "version"}


def resolve_actor(as_handle: str | None = None) -> str:
    """Who is writing: --as, else $IVDOSSIER_USER, else the operating-system user."""
    actor = as_handle or os.environ.get(ENV_USER) or _os_user()
    actor = actor.strip()
    if not actor or len(actor) > 64 or any(unicodedata.category(c)[0] == "C" for c in actor):
        raise InvalidInputError(
            f"actor {actor!r} is not a usable name; pass --as HANDLE (1-64 printable characters)."
        )
    return actor


def _os_user() -> str:
    try:
        return getpass.getuser()
    except Exception:  # no user database entry (some containers)
        return "unknown"


def slugify(text: str, *, max_length: int = 64) -> str:
    """A lowercase ASCII slug from free text ("Fibre roll-out wave" -> "fibre-roll-out-wave")."""
    ascii_text = unicodedata.normalize("NFKD", text).encode("ascii", "ignore").decode()
    slug = re.sub(r"[^a-z0-9]+", "-", ascii_text.lower()).strip("-")
    return slug[:max_length].rstrip("-") or "item"


def check_slug(slug: str, *, what: str) -> str:
    """Validate a user-chosen slug so that it is safe in URLs and file names."""
    if not SLUG_RE.match(slug):
        raise InvalidInputError(
            f"{what} slug {slug!r} is not allowed; use 1-64 lowercase letters, digits and hyphens, "
            f"for example {slugify(slug)!r}."
        )
    return slug


def check_text(value: str, *, field: str, max_length: int = TEXT_LIMIT) -> str:
    """Reject text the registry cannot store faithfully (NUL bytes, absurd sizes)."""
    if "\x00" in value:
        raise InvalidInputError(f"{field} contains a NUL character; remove it and try again.")
    if len(value) > max_length:
        raise InvalidInputError(f"{field} is {len(value):,} characters long; the limit is {max_length:,}.")
    return value


def read_text_file(path: str | Path, *, field: str, max_length: int = TEXT_LIMIT) -> str:
    """The text of a file given for a text option (`@FILE`), read with a bound: a file longer than the field
    allows, or an endless one such as /dev/zero, is refused before it is read whole."""
    text = read_bounded_text(
        path, 4 * max_length, what=f"the {field} text"
    )  # UTF-8: at most 4 bytes a character
    return check_text(text, field=field, max_length=max_length)


def _label_column(cls: type[Entity]) -> Any:
    return getattr(cls, cls.label_field)


def find(session: Session, cls: type[E], label: str) -> E | None:
    return session.scalars(select(cls).where(_label_column(cls) == label)).first()


def get(session: Session, cls: type[E], label: str) -> E:
    """The entity of this kind with this slug (or code/handle/key), or a NotFoundError suggesting close names."""
    found = find(session, cls, label)
    if found is not None:
        return found
    names = [str(x) for x in session.scalars(select(_label_column(cls))).all()]
    close = difflib.get_close_matches(label, names, n=3)
    hint = f" Did you mean {', '.join(repr(c) for c in close)}?" if close else ""
    list_cmd = f"ivdossier {cls.kind} list" if cls.kind in LISTABLE else "the listing commands"
    raise NotFoundError(f"no {cls.kind} named {label!r} in this registry.{hint} See `{list_cmd}`.")


LISTABLE = {"program", "instrument", "member", "link", "threat", "study", "run", "plan"}


def get_by_id(session: Session, cls: type[E], ident: int) -> E:
    obj = session.get(cls, ident)
    if obj is None:
        raise NotFoundError(f"{cls.kind} #{ident} does not exist.")
    return obj


def json_value(value: Any) -> Any:
    if isinstance(value, datetime):
        return value.isoformat()
    return value


def snapshot(obj: Entity, *, bookkeeping: bool = False) -> dict[str, Any]:
    """A JSON-safe dict of the entity's columns (without bookkeeping columns unless asked)."""
    out: dict[str, Any] = {}
    for col in obj.__table__.columns:  # type: ignore[attr-defined]
        if not bookkeeping and col.name in BOOKKEEPING:
            continue
        out[col.name] = json_value(getattr(obj, col.name))
    return out


def audit(
    session: Session,
    *,
    actor: str,
    action: str,
    obj: Entity,
    before: Mapping[str, Any] | None,
    after: Mapping[str, Any] | None,
    reason: str = "",
) -> AuditEvent:
    event = AuditEvent(
        actor=actor,
        action=action,
        entity_kind=obj.kind,
        entity_uuid=obj.uuid,
        entity_label=obj.label[:300],
        before=dict(before) if before is not None else None,
        after=dict(after) if after is not None else None,
        reason=reason,
    )
    session.add(event)
    return event


def is_utf8(value: str) -> bool:
    """False for strings holding lone surrogates (undecodable bytes from the command line or a file)."""
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        return False
    return True


# Text fields that must not be blank, with the fix; the same rule for adding and for editing.
REQUIRED_TEXT: dict[tuple[str, str], str] = {
    ("instrument", "name"): "an instrument needs a name; pass --name 'Fibre roll-out wave'.",
    ("program", "title"): "a program needs a title; pass --title 'Does X reduce Y?'.",
}


def check_columns(obj: Entity, values: Mapping[str, Any] | None = None) -> None:
    """Refuse text a column cannot hold on every backend (NUL characters, values over the column length) and
    blanks in fields that need text (an instrument's name, a program's title).

    Checks `values` (column name -> new value) when given, else every column of `obj`.
    """
    columns = obj.__table__.columns  # type: ignore[attr-defined]
    items = values.items() if values is not None else ((c.name, getattr(obj, c.name)) for c in columns)
    for name, value in items:
        if not isinstance(value, str) or name not in columns:
            continue
        required = REQUIRED_TEXT.get((obj.kind, name))
        if required is not None and not value.strip():
            raise InvalidInputError(required)
        if "\x00" in value:
            raise InvalidInputError(f"{obj.kind} {name} contains a NUL character; remove it and try again.")
        if not is_utf8(value):
            raise InvalidInputError(
                f"{obj.kind} {name} contains bytes that are not UTF-8 text; re-save the text as UTF-8 and retry."
            )
        limit = getattr(columns[name].type, "length", None)
        if limit is not None and len(value) > limit:
            raise InvalidInputError(
                f"{obj.kind} {name} is {len(value):,} characters long; the limit is {limit:,}; shorten it."
            )


def stale_message(session: Session, obj: Entity, expected_version: int) -> str:
    """Explain a refused stale edit: who changed the entity since `expected_version`, when, and which fields."""
    head = f"{obj.kind} {obj.label!r} is at version {obj.version}, not {expected_version}"
    if expected_version > obj.version:
        return f"{head}: version {expected_version} does not exist yet; show it again and reapply your edit."
    # Every version step is one audited write, so the newest (version - expected) events are the changes since.
    events = list(
        session.scalars(
            select(AuditEvent)
            .where(AuditEvent.entity_uuid == obj.uuid)
            .order_by(AuditEvent.id.desc())  # type: ignore[union-attr]
            .limit(max(obj.version - expected_version, 1))
        )
    )
    events.reverse()
    parts = []
    for event in events:
        fields = ", ".join(sorted((event.after or event.before or {}).keys()))
        what = f"{event.action}: {fields}" if event.action != "create" and fields else event.action
        parts.append(f"by {event.actor} at {event.at:%Y-%m-%d %H:%M:%S} UTC ({what})")
    who = " it was changed " + ", then ".join(parts) if parts else " it was changed by someone else"
    return f"{head}:{who}; nothing was written, show it again and reapply your edit."


def create(session: Session, obj: E, *, actor: str, reason: str = "") -> E:
    """Insert a new entity and its audit event in the caller's transaction."""
    label = obj.label
    if find(session, type(obj), label) is not None:
        raise ConflictError(
            f"a {obj.kind} named {label!r} already exists; choose another name or edit that one."
        )
    check_columns(obj)
    session.add(obj)
    session.flush()
    audit(session, actor=actor, action="create", obj=obj, before=None, after=snapshot(obj), reason=reason)
    return obj


def edit(
    session: Session,
    obj: E,
    changes: Mapping[str, Any],
    *,
    actor: str,
    expected_version: int | None = None,
    action: str = "edit",
    reason: str = "",
) -> E:
    """Apply field changes with optimistic locking; records only the fields that really changed."""
    if expected_version is not None and expected_version != obj.version:
        raise ConflictError(stale_message(session, obj, expected_version))
    columns = {c.name for c in obj.__table__.columns}  # type: ignore[attr-defined]
    before: dict[str, Any] = {}
    after: dict[str, Any] = {}
    for name in changes:
        if name not in columns or name in BOOKKEEPING or name == "uuid":
            raise InvalidInputError(f"{obj.kind} has no editable field {name!r}.")
    check_columns(obj, changes)
    for name, value in changes.items():
        old = getattr(obj, name)
        if old != value:
            before[name] = json_value(old)
            after[name] = json_value(value)
            setattr(obj, name, value)
    if not after:
        return obj
    obj.updated_at = utcnow()
    session.add(obj)
    read = (type(obj), obj.id, obj.label, obj.version)  # the failed flush expires the object's attributes
    try:
        session.flush()
    except StaleDataError as exc:
        # Another transaction committed a change after we read the row (PostgreSQL, READ COMMITTED).
        raise ConflictError(_changed_meanwhile(session, *read)) from exc
    audit(session, actor=actor, action=action, obj=obj, before=before, after=after, reason=reason)
    return obj


def _changed_meanwhile(
    session: Session, cls: type[Entity], ident: int | None, label: str, read_version: int
) -> str:
    """The stale-edit message for a row changed by a concurrent transaction, read in a fresh transaction."""
    bind = session.get_bind()
    if bind.dialect.name == "sqlite":  # writers hold the database lock; a second connection would wait on it
        return (
            f"{cls.kind} {label!r} was changed by someone else while you were editing it; "
            "nothing was written, show it again and reapply your edit."
        )
    with Session(bind) as fresh:
        current = fresh.get(cls, ident)
        if current is None:
            return f"{cls.kind} {label!r} was deleted while you were editing it; nothing was written."
        return stale_message(fresh, current, read_version)


def delete(session: Session, obj: Entity, *, actor: str, reason: str = "") -> None:
    audit(session, actor=actor, action="delete", obj=obj, before=snapshot(obj), after=None, reason=reason)
    session.delete(obj)
    session.flush()
