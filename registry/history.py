"""Reading the append-only audit trail: one entity's story or the whole registry over a date range."""

from __future__ import annotations

from collections.abc import Collection
from datetime import datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from ivdossier.registry.models import AuditEvent


def history(
    session: Session,
    *,
    entity_uuid: str | None = None,
    entity_uuids: Collection[str] | None = None,
    since: datetime | None = None,
    until: datetime | None = None,
    actor: str | None = None,
    limit: int | None = None,
) -> list[AuditEvent]:
    """Audit events, oldest first, filtered by entity, time range and actor."""
    query = select(AuditEvent)
    if entity_uuid is not None:
        query = query.where(AuditEvent.entity_uuid == entity_uuid)
    if entity_uuids is not None:
        query = query.where(AuditEvent.entity_uuid.in_(list(entity_uuids)))  # type: ignore[attr-defined]
    if since is not None:
        query = query.where(AuditEvent.at >= since)
    if until is not None:
        query = query.where(AuditEvent.at < until)
    if actor is not None:
        query = query.where(AuditEvent.actor == actor)
    query = query.order_by(AuditEvent.at, AuditEvent.id)  # type: ignore[arg-type]
    if limit is not None:
        query = query.limit(limit)
    return list(session.scalars(query))


def event_to_dict(event: AuditEvent) -> dict[str, object]:
    return {
        "at": event.at.isoformat(),
        "actor": event.actor,
        "action": event.action,
        "entity_kind": event.entity_kind,
        "entity_uuid": event.entity_uuid,
        "entity": event.entity_label,
        "before": event.before,
        "after": event.after,
        "reason": event.reason,
    }
