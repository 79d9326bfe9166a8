"""Batch reads for documents that show many instruments at once (the static site): one query per table, grouped
by the key the caller looks rows up by, instead of one query per instrument, link or run.

The same tables and ordering as the one-row readers (`runs_of`, `links_of`, `covariates_of`,
`edges_of`, `history`), so a document built from these groups is identical to one built row by row. ``ids=None``
reads every row; a given id list is read in chunks that stay within every backend's limit on bound parameters.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Collection, Iterator
from datetime import datetime
from typing import Any, NamedTuple

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


# Column reads: the same rows and order as the one-row readers, as plain tuples (no model objects are built, which
# is most of the cost of reading a large registry).


class LinkRow(NamedTuple):
    """The columns of a link that documents show."""

    id: int
    uuid: str
    slug: str
    instrument_id: int
    threat_id: int
    state: str
    argument: str
    evidence: str


class RatingRow(NamedTuple):
    """One rating with its reviewer's handle."""

    link_id: int
    handle: str
    likelihood: int
    severity: int
    comment: str


class EventRow(NamedTuple):
    """The columns of an audit event that documents show."""

    id: int
    entity_uuid: str
    at: datetime
    actor: str
    action: str
    entity_label: str
    reason: str
    after: dict[str, Any] | None


def link_rows_by_instrument(
    session: Session, instrument_ids: Collection[int] | None = None
) -> tuple[dict[int, list[tuple[LinkRow, Threat]]], dict[int, Threat]]:
    """Instrument id -> its (link, threat) pairs ordered by threat code (then link id), as `registry.threats.links_of`,
    with each link as a `LinkRow`; and the threats by id (one object per threat, however many links it has)."""
    pairs: list[LinkRow] = []
    for chunk in _chunks(instrument_ids):
        query = select(*(getattr(Link, f) for f in LinkRow._fields)).join(Threat, Link.threat_id == Threat.id)
        if chunk is not None:
            query = query.where(Link.instrument_id.in_(chunk))
        pairs.extend(LinkRow(*row) for row in session.execute(query.order_by(Threat.code, Link.id)))
    threats = {t.id: t for t in session.scalars(select(Threat)) if t.id is not None}
    out: dict[int, list[tuple[LinkRow, Threat]]] = defaultdict(list)
    for lk in pairs:  # an instrument's links all come from one chunk, in the query's order
        out[lk.instrument_id].append((lk, threats[lk.threat_id]))
    return out, threats


def rating_rows_by_link(
    session: Session, link_ids: Collection[int] | None = None
) -> dict[int, list[RatingRow]]:
    """Link id -> its ratings ordered by the reviewer's handle (then rating id)."""
    out: dict[int, list[RatingRow]] = defaultdict(list)
    for chunk in _chunks(link_ids):
        query = select(
            Rating.link_id, Member.handle, Rating.likelihood, Rating.severity, Rating.comment
        ).where(Rating.member_id == Member.id)
        if chunk is not None:
            query = query.where(Rating.link_id.in_(chunk))
        for row in session.execute(query.order_by(Member.handle, Rating.id)):
            out[row[0]].append(RatingRow(*row))
    return out


def event_rows_by_entity(
    session: Session, entity_uuids: Collection[str] | None = None
) -> dict[str, list[EventRow]]:
    """Entity uuid -> its audit events, oldest first (ties by id), as `registry.history.history`."""
    out: dict[str, list[EventRow]] = defaultdict(list)
    for chunk in _chunks(entity_uuids):
        query = select(*(getattr(AuditEvent, f) for f in EventRow._fields))
        if chunk is not None:
            query = query.where(AuditEvent.entity_uuid.in_(chunk))
        for row in session.execute(query.order_by(AuditEvent.at, AuditEvent.id)):
            out[row[1]].append(EventRow(*row))
    return out
