"""Batch reads for documents that show many instruments at once (the static site): one query per table, grouped
by the key the caller looks rows up by, instead of one query per instrument, link or run.

The same tables and ordering as the one-row readers (`runs_of`, `links_of`, `covariates_of`,
`edges_of`, `history`), so a document built from these groups is identical to one built row by row. ``ids=None``
reads every row; a given id list is read in chunks that stay within every backend's limit on bound parameters.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Collection, Iterator, Sequence
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from ivdossier.registry.models import (
    AuditEvent,
    Covariate,
    Dataset,
    GraphEdge,
    Instrument,
    Link,
    Member,
    Program,
    Rating,
    Run,
    Threat,
)

CHUNK = 900  # bound parameters per IN list (SQLite's historical limit is 999)


def _chunks(ids: Collection[Any] | None) -> Iterator[list[Any] | None]:
    if ids is None:
        yield None
        return
    values = sorted(set(ids), key=str)
    for start in range(0, len(values), CHUNK):
        yield values[start : start + CHUNK]


def programs(session: Session) -> dict[int, Program]:
    """Every program by id."""
    return {p.id: p for p in session.scalars(select(Program)) if p.id is not None}


def instruments(session: Session) -> list[Instrument]:
    """Every instrument, by slug."""
    return list(session.scalars(select(Instrument).order_by(Instrument.slug)))


def links_by_instrument(
    session: Session, instrument_ids: Collection[int] | None = None
) -> dict[int, list[tuple[Link, Threat]]]:
    """Instrument id -> its (link, threat) pairs ordered by threat code, as `registry.threats.links_of`."""
    out: dict[int, list[tuple[Link, Threat]]] = defaultdict(list)
    for chunk in _chunks(instrument_ids):
        query = select(Link, Threat).where(Link.threat_id == Threat.id)
        if chunk is not None:
            query = query.where(Link.instrument_id.in_(chunk))
        for link, threat in session.execute(query.order_by(Threat.code, Link.id)):
            out[link.instrument_id].append((link, threat))
    return out


def ratings_by_link(
    session: Session, link_ids: Collection[int] | None = None
) -> dict[int, list[tuple[Rating, Member]]]:
    """Link id -> its (rating, reviewer) pairs ordered by the reviewer's handle."""
    out: dict[int, list[tuple[Rating, Member]]] = defaultdict(list)
    for chunk in _chunks(link_ids):
        query = select(Rating, Member).where(Rating.member_id == Member.id)
        if chunk is not None:
            query = query.where(Rating.link_id.in_(chunk))
        for rating, member in session.execute(query.order_by(Member.handle, Rating.id)):
            out[rating.link_id].append((rating, member))
    return out


def runs_by_instrument(
    session: Session, instrument_ids: Collection[int] | None = None
) -> dict[int, list[Run]]:
    """Instrument id -> its runs, oldest first, as `registry.runs.runs_of`."""
    out: dict[int, list[Run]] = defaultdict(list)
    for chunk in _chunks(instrument_ids):
        query = select(Run).where(Run.instrument_id.is_not(None))
        if chunk is not None:
            query = query.where(Run.instrument_id.in_(chunk))
        for run in session.scalars(query.order_by(Run.created_at, Run.id)):
            if run.instrument_id is not None:
                out[run.instrument_id].append(run)
    return out


def datasets(session: Session, dataset_ids: Collection[int]) -> dict[int, Dataset]:
    """Dataset id -> dataset, for the given ids."""
    out: dict[int, Dataset] = {}
    for chunk in _chunks(dataset_ids):
        query = select(Dataset)
        if chunk is not None:
            query = query.where(Dataset.id.in_(chunk))
        out.update({d.id: d for d in session.scalars(query) if d.id is not None})
    return out


def covariates_by_program(session: Session) -> dict[int, list[Covariate]]:
    """Program id -> its declared covariates by name, as `registry.instruments.covariates_of`."""
    out: dict[int, list[Covariate]] = defaultdict(list)
    for c in session.scalars(select(Covariate).order_by(Covariate.program_id, Covariate.name)):
        out[c.program_id].append(c)
    return out


def edges_by_program(session: Session) -> dict[int, list[GraphEdge]]:
    """Program id -> its team edges by slug (program-wide and instrument-scoped), as `edges_of`."""
    out: dict[int, list[GraphEdge]] = defaultdict(list)
    for e in session.scalars(select(GraphEdge).order_by(GraphEdge.program_id, GraphEdge.slug)):
        out[e.program_id].append(e)
    return out


def events_by_entity(
    session: Session, entity_uuids: Collection[str] | None = None
) -> dict[str, list[AuditEvent]]:
    """Entity uuid -> its audit events, oldest first, as `registry.history.history`."""
    out: dict[str, list[AuditEvent]] = defaultdict(list)
    for chunk in _chunks(entity_uuids):
        query = select(AuditEvent)
        if chunk is not None:
            query = query.where(AuditEvent.entity_uuid.in_(chunk))
        for event in session.scalars(query.order_by(AuditEvent.at, AuditEvent.id)):
            out[event.entity_uuid].append(event)
    return out


def merged_events(groups: dict[str, list[AuditEvent]], uuids: Sequence[str]) -> list[AuditEvent]:
    """The events of several entities in one list, oldest first (ties by id), as one `history` query returns."""
    events = [e for u in dict.fromkeys(uuids) for e in groups.get(u, ())]
    return sorted(events, key=lambda e: (e.at, e.id or 0))
