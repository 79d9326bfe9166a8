"""Storage of pre-analysis plans: canonical form and hash, the plan row's create/edit/freeze, the frozen-plan guard.

A plan's content is plain JSON (drafted by ``ivdossier.workflows.plans``). Freezing seals a document made of the plan's identity, its
content, the time and the author: canonical JSON (sorted keys, no insignificant whitespace, UTF-8, integral floats
written as integers, infinities as "inf"/"-inf") hashed with SHA-256. The sealed document is also written to the
audit trail as the plan's one seal event (same actor, time and hash as the row), so verification
(``ivdossier.workflows.plan_check``) can say which field changed, not only that something did; an audit event imported
from another registry is that registry's history and never counts as this registry's seal (``is_own_seal``). Freezing
also yields a seal receipt (``seal_receipt``): the canonical bytes, their SHA-256, time, author, plan identity and tool
version, for a team to keep outside the database. Frozen plans are read-only: any ORM update or delete of a frozen row
raises ConflictError (a mapper event registered here).
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime, timedelta
from typing import Any

from sqlalchemy import event, inspect, select
from sqlalchemy.orm import Session

from ivdossier import __version__
from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.registry import records
from ivdossier.registry.models import AuditEvent, Instrument, Plan, Program, utcnow

PLAN_SCHEMA = "ivdossier-plan/1"
EXPORT_FORMAT = "ivdossier-frozen-plan/1"
RECEIPT_FORMAT = "ivdossier-seal-receipt/1"
SEAL_ACTION = "sealed"
# Marks of another registry's seal events kept here as history: an action prefix, or a key in the event's `after`.
IMPORTED_ACTION_PREFIX = "imported:"
FOREIGN_MARKERS = ("imported", "origin")
# Seals recorded before the event's time was set to the freeze time carry the clock a moment later.
LEGACY_SEAL_SLACK = timedelta(seconds=2)


# ---------------------------------------------------------------- canonical form


def normalise(value: Any, path: str = "") -> Any:
    """JSON-ready copy with normalised numbers: integral floats as int, -0.0 as 0, +/-inf as strings."""
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int):
        return value
    if isinstance(value, float):
        if math.isnan(value):
            raise InvalidInputError(
                f"plan value at {path or 'top level'} is NaN; replace it with a number or null."
            )
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        if value.is_integer() and abs(value) < 2**53:
            return int(value)
        return value
    if isinstance(value, Mapping):
        return {str(k): normalise(v, f"{path}.{k}" if path else str(k)) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [normalise(v, f"{path}[{i}]") for i, v in enumerate(value)]
    if isinstance(value, datetime):
        return iso(value)
    raise InvalidInputError(
        f"plan value at {path or 'top level'} has type {type(value).__name__}; use JSON data."
    )


def canonical_json(value: Any) -> bytes:
    """Canonical serialisation: sorted keys, no insignificant whitespace, UTF-8, normalised numbers."""
    return json.dumps(
        normalise(value), sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


def sha256_of(value: Any) -> str:
    return hashlib.sha256(canonical_json(value)).hexdigest()


def iso(moment: datetime) -> str:
    """UTC timestamp to the second, e.g. 2026-01-31T09:30:00Z (naive datetimes are read as UTC)."""
    aware = moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)
    return aware.strftime("%Y-%m-%dT%H:%M:%SZ")


# ---------------------------------------------------------------- the plan row


def next_slug(session: Session, base: str) -> str:
    base = base[:60].rstrip("-")
    taken = set(session.scalars(select(Plan.slug).where(Plan.slug.startswith(base))))  # type: ignore[attr-defined]
    if base not in taken:
        return base
    n = 2
    while f"{base}-{n}" in taken:
        n += 1
    return f"{base}-{n}"


def create_plan(
    session: Session,
    *,
    actor: str,
    program: Program,
    instrument: Instrument | None,
    content: Mapping[str, Any],
    slug: str | None = None,
    title: str | None = None,
    default_slug: str,
) -> Plan:
    """Store a new draft plan row with the given content (checked to be JSON data)."""
    plan_slug = records.check_slug(slug or next_slug(session, default_slug), what="plan")
    normalise(content)
    plan = Plan(
        slug=plan_slug,
        program_id=program.id or 0,
        instrument_id=instrument.id if instrument is not None else None,
        title=records.check_text(
            title or f"Pre-analysis plan: {program.title}", field="title", max_length=300
        ),
        content=dict(content),
        state="draft",
    )
    return records.create(session, plan, actor=actor)


EDITABLE_SECTIONS = (
    "data",
    "specs",
    "diagnostics",
    "decision_rules",
    "power",
    "deviations",
    "threats",
    "graph",
)


def check_sections(sections: Mapping[str, Any]) -> None:
    """Refuse a section name that cannot be edited."""
    for name in sections:
        if name not in EDITABLE_SECTIONS:
            raise InvalidInputError(
                f"plan section {name!r} cannot be edited; use one of {', '.join(EDITABLE_SECTIONS)}."
            )


def edit_plan(
    session: Session,
    *,
    actor: str,
    slug: str,
    title: str | None = None,
    sections: Mapping[str, Any] | None = None,
    expected_version: int | None = None,
) -> Plan:
    """Replace whole sections of a draft plan's content; frozen plans refuse. Decision rules are stored as given:
    validate them first (``ivdossier.workflows.plans.edit_plan`` does)."""
    plan = records.get(session, Plan, slug)
    refuse_if_frozen(plan)
    check_sections(sections or {})
    content = dict(plan.content or {})
    content.update(sections or {})
    normalise(content)
    changes: dict[str, Any] = {"content": content}
    if title is not None:
        changes["title"] = records.check_text(title, field="title", max_length=300)
    return records.edit(session, plan, changes, actor=actor, expected_version=expected_version)


# ---------------------------------------------------------------- freezing


def refuse_if_frozen(plan: Plan) -> None:
    if plan.state == "frozen":
        raise ConflictError(
            f"plan {plan.slug!r} is frozen (sealed {plan.frozen_at and iso(plan.frozen_at)} by {plan.frozen_by}) "
            "and cannot be changed; draft a new plan and report the differences as deviations."
        )


@event.listens_for(Plan, "before_update")
def _guard_update(_mapper: Any, _conn: Any, target: Plan) -> None:
    history = inspect(target).attrs.state.history
    before = history.deleted[0] if history.deleted else target.state
    if before == "frozen":
        raise ConflictError(
            f"plan {target.slug!r} is frozen and cannot be changed; draft a new plan and report the differences "
            "as deviations."
        )


@event.listens_for(Plan, "before_delete")
def _guard_delete(_mapper: Any, _conn: Any, target: Plan) -> None:
    if target.state == "frozen":
        raise ConflictError(f"plan {target.slug!r} is frozen and cannot be deleted.")


def sealed_document(
    session: Session, plan: Plan, *, frozen_at: datetime | None = None, frozen_by: str | None = None
) -> dict[str, Any]:
    """What the hash covers: identity, title, content, and the freeze time and author (overridable at freeze)."""
    moment = frozen_at if frozen_at is not None else plan.frozen_at
    author = frozen_by if frozen_by is not None else plan.frozen_by
    program = session.get(Program, plan.program_id)
    inst = session.get(Instrument, plan.instrument_id) if plan.instrument_id else None
    return normalise(
        {
            "schema": EXPORT_FORMAT,
            "plan": plan.slug,
            "program": program.slug if program else None,
            "instrument": inst.slug if inst else None,
            "title": plan.title,
            "content": plan.content or {},
            "frozen_at": iso(moment) if moment else None,
            "frozen_by": author,
        }
    )


def freeze_plan(session: Session, *, actor: str, slug: str, at: datetime | None = None) -> Plan:
    """Seal a draft: store time, author and the SHA-256 of its canonical form; record the sealed document.

    Decision rules are not checked here: ``ivdossier.workflows.plans.freeze_plan`` validates them first."""
    plan = records.get(session, Plan, slug)
    refuse_if_frozen(plan)
    moment = (at or utcnow()).astimezone(UTC).replace(microsecond=0)
    sealed = sealed_document(session, plan, frozen_at=moment, frozen_by=actor)
    digest = sha256_of(sealed)
    records.edit(
        session,
        plan,
        {"state": "frozen", "frozen_at": moment, "frozen_by": actor, "sha256": digest},
        actor=actor,
        action="freeze",
    )
    event_row = records.audit(
        session,
        actor=actor,
        action=SEAL_ACTION,
        obj=plan,
        before=None,
        after={"sha256": digest, "sealed": sealed},
    )
    event_row.at = moment  # the seal event carries exactly the row's freeze time and author
    return plan


def export_document(session: Session, slug: str) -> str:
    """The frozen plan as a JSON file: format, SHA-256 and the sealed document (indented, sorted keys)."""
    plan = records.get(session, Plan, slug)
    if plan.state != "frozen":
        raise InvalidInputError(f"plan {slug!r} is a draft; freeze it before exporting a sealed copy.")
    data = {"format": EXPORT_FORMAT, "sha256": plan.sha256, "sealed": sealed_document(session, plan)}
    return json.dumps(data, indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def _utc(moment: datetime) -> datetime:
    return moment.replace(tzinfo=UTC) if moment.tzinfo is None else moment.astimezone(UTC)


def is_imported_seal(event_row: AuditEvent) -> bool:
    """True for a seal event kept as another registry's history: the import's action prefix, or an `imported`/
    `origin` marker in the seal's own `after` (a seal written here has only `sha256` and `sealed`)."""
    if event_row.action.startswith(IMPORTED_ACTION_PREFIX):
        return True
    after = event_row.after if isinstance(event_row.after, dict) else {}
    return any(after.get(marker) not in (None, False, "", "local") for marker in FOREIGN_MARKERS)


def seal_time_agrees(event_row: AuditEvent, plan: Plan) -> bool:
    """The event's time is the row's freeze time (to the second; older seals may trail it by a moment)."""
    if plan.frozen_at is None:
        return False
    lag = _utc(event_row.at) - _utc(plan.frozen_at)
    return iso(event_row.at) == iso(plan.frozen_at) or timedelta(0) <= lag <= LEGACY_SEAL_SLACK


def is_own_seal(event_row: AuditEvent, plan: Plan | None = None) -> bool:
    """Whether an audit event is this registry's seal of a plan: a `sealed` event recorded here (not imported).

    With `plan`, the event must also name the plan and agree with its row on actor, time and hash."""
    if event_row.action != SEAL_ACTION or is_imported_seal(event_row):
        return False
    if plan is None:
        return True
    after = event_row.after if isinstance(event_row.after, dict) else {}
    return (
        event_row.entity_uuid == plan.uuid
        and event_row.actor == plan.frozen_by
        and seal_time_agrees(event_row, plan)
        and after.get("sha256") == plan.sha256
    )


def seal_events(session: Session, plan: Plan) -> list[AuditEvent]:
    """Every audit event of the plan that records a seal, this registry's or imported, oldest first."""
    rows = session.scalars(
        select(AuditEvent).where(AuditEvent.entity_uuid == plan.uuid).order_by(AuditEvent.id)  # type: ignore[arg-type]
    )
    return [e for e in rows if e.action == SEAL_ACTION or e.action.endswith(":" + SEAL_ACTION)]


def recorded_seal(session: Session, plan: Plan) -> dict[str, Any] | None:
    """The sealed document of the plan's seal event (the latest recorded by this registry), or None."""
    own = [e for e in seal_events(session, plan) if is_own_seal(e)]
    if not own or not isinstance(own[-1].after, dict):
        return None
    sealed = own[-1].after.get("sealed")
    return sealed if isinstance(sealed, dict) else None


# ---------------------------------------------------------------- the seal receipt


def seal_receipt(session: Session, plan: Plan, *, written_at: datetime | None = None) -> dict[str, Any]:
    """The receipt of a frozen plan's seal: the exact canonical bytes hashed (as text), their SHA-256, time, author,
    plan identity and tool version. Anyone can check it without this tool: the SHA-256 of the UTF-8 bytes of
    `canonical` is `sha256`."""
    if plan.state != "frozen":
        raise InvalidInputError(f"plan {plan.slug!r} is a draft; freeze it before writing a seal receipt.")
    sealed = sealed_document(session, plan)
    return {
        "format": RECEIPT_FORMAT,
        "plan": plan.slug,
        "plan_uuid": plan.uuid,
        "program": sealed.get("program"),
        "instrument": sealed.get("instrument"),
        "sealed_at": sealed.get("frozen_at"),
        "sealed_by": sealed.get("frozen_by"),
        "sha256": plan.sha256,
        "canonical": canonical_json(sealed).decode("utf-8"),
        "written_at": iso(written_at or utcnow()),
        "tool": f"ivdossier {__version__}",
        "check": "SHA-256 of the UTF-8 bytes of 'canonical' equals 'sha256'; "
        "`ivdossier plan verify PLAN --receipt FILE` compares the receipt with a registry.",
    }


def receipt_text(receipt: Mapping[str, Any]) -> str:
    """The receipt as a file: indented JSON with sorted keys and a final newline."""
    return json.dumps(dict(receipt), indent=2, sort_keys=True, ensure_ascii=False) + "\n"


def plan_dict(session: Session, plan: Plan) -> dict[str, Any]:
    """JSON-safe view of a plan row."""
    data = records.snapshot(plan, bookkeeping=True)
    program = session.get(Program, plan.program_id)
    inst = session.get(Instrument, plan.instrument_id) if plan.instrument_id else None
    data["program"] = program.slug if program else None
    data["instrument"] = inst.slug if inst else None
    if plan.frozen_at is not None:
        data["frozen_at"] = iso(plan.frozen_at)
    return data


def plan_dicts(session: Session, plans: Sequence[Plan]) -> list[dict[str, Any]]:
    """`plan_dict` of several plans, their programs and instruments read in one query each (not one per plan)."""
    program_ids = {p.program_id for p in plans}
    instrument_ids = {p.instrument_id for p in plans if p.instrument_id}
    # Held here so the session's identity map keeps them: plan_dict's session.get then finds them without a query.
    loaded = [
        *session.scalars(select(Program).where(Program.id.in_(program_ids))),  # type: ignore[union-attr]
        *session.scalars(select(Instrument).where(Instrument.id.in_(instrument_ids))),  # type: ignore[union-attr]
    ]
    out = [plan_dict(session, p) for p in plans]
    del loaded
    return out
