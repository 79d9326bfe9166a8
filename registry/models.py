"""SQLModel tables of the registry: one class per entity, every row with a UUID, a slug and a version."""

from __future__ import annotations

import uuid as uuid_mod
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from datetime import UTC, datetime
from typing import Any, ClassVar

from sqlalchemy import JSON, Column, Index, UniqueConstraint, false, text
from sqlalchemy.orm import declared_attr
from sqlmodel import Field, SQLModel

from ivdossier.vocabulary import CONDITIONS, LIFECYCLE_STATES, LINK_STATES, READING_ASPECTS, THREAT_KINDS

__all__ = ["CONDITIONS", "LIFECYCLE_STATES", "LINK_STATES", "READING_ASPECTS", "THREAT_KINDS"]

# Allowed lifecycle moves: from -> set of targets.
LIFECYCLE_MOVES: dict[str, tuple[str, ...]] = {
    "proposed": ("vetting", "rejected", "shelved"),
    "vetting": ("adopted", "rejected", "shelved", "proposed"),
    "adopted": ("vetting", "shelved"),
    "rejected": ("vetting",),
    "shelved": ("proposed", "vetting"),
}


_CLOCK: ContextVar[Callable[[], datetime] | None] = ContextVar("ivdossier_registry_clock", default=None)


def utcnow() -> datetime:
    """Current time in UTC, timezone-aware; inside ``with clock(source)`` the source answers instead."""
    source = _CLOCK.get()
    return source() if source is not None else datetime.now(UTC)


@contextmanager
def clock(source: Callable[[], datetime]) -> Iterator[None]:
    """Take every registry timestamp in the block from `source` (a reproducible demo, golden-file tests)."""
    token = _CLOCK.set(source)
    try:
        yield
    finally:
        _CLOCK.reset(token)


def new_uuid() -> str:
    return str(uuid_mod.uuid4())


def _json() -> Any:
    return Field(default=None, sa_column=Column(JSON))


class Entity(SQLModel):
    """Columns every entity carries: surrogate key, UUID, timestamps and an optimistic-locking version."""

    id: int | None = Field(default=None, primary_key=True)
    uuid: str = Field(default_factory=new_uuid, max_length=36, unique=True, index=True)
    created_at: datetime = Field(default_factory=utcnow)
    updated_at: datetime = Field(default_factory=utcnow)
    version: int = Field(default=1)

    # Human label used in messages and the audit trail; subclasses point it at their slug column.
    label_field: ClassVar[str] = "slug"
    kind: ClassVar[str] = "entity"

    @declared_attr  # type: ignore[misc, arg-type]
    def __mapper_args__(cls) -> dict[str, Any]:
        # SQLAlchemy's version counter: an UPDATE based on a stale version matches no row and fails.
        return {"version_id_col": cls.__table__.c.version}  # type: ignore[attr-defined]

    @property
    def label(self) -> str:
        return str(getattr(self, self.label_field))


class Member(Entity, table=True):
    kind: ClassVar[str] = "member"
    label_field: ClassVar[str] = "handle"

    handle: str = Field(max_length=64, unique=True, index=True)
    name: str = Field(default="", max_length=200)
    email: str = Field(default="", max_length=320)


class Program(Entity, table=True):
    kind: ClassVar[str] = "program"

    slug: str = Field(max_length=64, unique=True, index=True)
    title: str = Field(max_length=300)
    question: str = Field(default="")
    treatment: str = Field(default="", max_length=200)
    outcome: str = Field(default="", max_length=200)
    unit: str = Field(default="", max_length=200)
    population: str = Field(default="")
    notes: str = Field(default="")


class Instrument(Entity, table=True):
    kind: ClassVar[str] = "instrument"

    slug: str = Field(max_length=64, unique=True, index=True)
    program_id: int = Field(foreign_key="program.id", index=True)
    name: str = Field(max_length=300)
    family: str = Field(default="", max_length=64, index=True)
    columns: list[str] | None = _json()
    state: str = Field(default="proposed", max_length=16)
    description: str = Field(default="")
    claim_relevance: str = Field(default="")
    claim_exclusion: str = Field(default="")
    claim_exogeneity: str = Field(default="")
    claim_monotonicity: str = Field(default="")


class Covariate(Entity, table=True):
    """A variable the team declares in a program's causal graph, measured in the data or not."""

    kind: ClassVar[str] = "covariate"
    __table_args__ = (UniqueConstraint("program_id", "name"),)

    slug: str = Field(max_length=140, unique=True, index=True)
    program_id: int = Field(foreign_key="program.id", index=True)
    name: str = Field(max_length=100)
    measured: bool = Field(default=True)
    description: str = Field(default="")


class GraphEdge(Entity, table=True):
    """An edge a user adds to a program's causal graph by hand (beyond roles and threat fragments).

    ``instrument_id`` scopes it: None draws it in every instrument's graph of the program, an instrument's id
    only in that instrument's graph (so an edge into one instrument's column leaves its siblings alone).
    """

    kind: ClassVar[str] = "edge"
    __table_args__ = (
        UniqueConstraint("program_id", "instrument_id", "source", "target", name="uq_graphedge_scope_ends"),
    )

    slug: str = Field(max_length=240, unique=True, index=True)
    program_id: int = Field(foreign_key="program.id", index=True)
    instrument_id: int | None = Field(default=None, foreign_key="instrument.id", index=True)
    source: str = Field(max_length=100)
    target: str = Field(max_length=100)
    note: str = Field(default="")


class Threat(Entity, table=True):
    """A catalogue entry: built in (shipped data files) or written by the team."""

    kind: ClassVar[str] = "threat"
    label_field: ClassVar[str] = "code"

    code: str = Field(max_length=32, unique=True, index=True)
    title: str = Field(max_length=300)
    condition: str = Field(max_length=16, index=True)
    mechanism: str = Field(default="", max_length=64)
    families: list[str] | None = _json()
    description: str = Field(default="")
    fragment: dict[str, Any] | None = _json()
    testability: str = Field(default="argument-only", max_length=20)
    checks: list[str] | None = _json()
    mitigations: list[str] | None = _json()
    references: list[str] | None = _json()
    origin: str = Field(default="team", max_length=10)  # "builtin" or "team"
    catalog_version: str = Field(default="", max_length=20)
    # The catalogue's "kind" ("kind" names the entity class here): "condition" (attacks relevance, exclusion,
    # exogeneity or monotonicity) or "reading" (what the estimate means, its uncertainty, how the specification
    # was chosen). Added in schema 0002.
    threat_kind: str = Field(
        default="condition", max_length=12, sa_column_kwargs={"server_default": "condition"}
    )
    # For a built-in code that was merged or replaced: the successor's code (links were carried over to it).
    retired_into: str = Field(default="", max_length=32, sa_column_kwargs={"server_default": ""})


class Link(Entity, table=True):
    """A threat attached to one instrument, with the team's current state and argument."""

    kind: ClassVar[str] = "link"
    __table_args__ = (UniqueConstraint("instrument_id", "threat_id"),)

    slug: str = Field(max_length=100, unique=True, index=True)
    instrument_id: int = Field(foreign_key="instrument.id", index=True)
    threat_id: int = Field(foreign_key="threat.id", index=True)
    state: str = Field(default="open", max_length=12)
    argument: str = Field(default="")
    evidence: str = Field(default="")


class Dismissal(Entity, table=True):
    """A family-level threat the team has looked at for one instrument and judged not to apply."""

    kind: ClassVar[str] = "dismissal"
    __table_args__ = (UniqueConstraint("instrument_id", "threat_id"),)

    slug: str = Field(max_length=100, unique=True, index=True)
    instrument_id: int = Field(foreign_key="instrument.id", index=True)
    threat_id: int = Field(foreign_key="threat.id", index=True)
    reason: str = Field(default="")


class Rating(Entity, table=True):
    """One reviewer's likelihood and severity (1-5) for one link."""

    kind: ClassVar[str] = "rating"
    __table_args__ = (UniqueConstraint("link_id", "member_id"),)

    slug: str = Field(max_length=170, unique=True, index=True)
    link_id: int = Field(foreign_key="link.id", index=True)
    member_id: int = Field(foreign_key="member.id", index=True)
    likelihood: int
    severity: int
    comment: str = Field(default="")


class Study(Entity, table=True):
    """A past or published study that used an instrument, with what it reported."""

    kind: ClassVar[str] = "study"
    label_field: ClassVar[str] = "key"

    key: str = Field(max_length=120, unique=True, index=True)
    entry_type: str = Field(default="article", max_length=32)
    authors: str = Field(default="")
    title: str = Field(default="")
    year: int | None = Field(default=None)
    venue: str = Field(default="")
    doi: str = Field(default="", max_length=200)
    families: list[str] | None = _json()
    instruments: list[str] | None = _json()  # instrument slugs this study used or speaks to
    reported: dict[str, Any] | None = _json()  # point estimate, se, first-stage F and kind, n, clusters ...
    extra: dict[str, Any] | None = _json()  # other BibTeX fields, kept for a faithful round trip
    # a published per-variant summary table attached for re-analysis: source, sha256, columns and rows as read
    variant_table: dict[str, Any] | None = _json()


class Critique(Entity, table=True):
    """A catalogue threat raised against a study, optionally by another study."""

    kind: ClassVar[str] = "critique"
    __table_args__ = (UniqueConstraint("study_id", "threat_id", "raised_by_id"),)

    slug: str = Field(max_length=280, unique=True, index=True)
    study_id: int = Field(foreign_key="study.id", index=True)
    threat_id: int = Field(foreign_key="threat.id", index=True)
    raised_by_id: int | None = Field(default=None, foreign_key="study.id")
    note: str = Field(default="")


class Dataset(Entity, table=True):
    """A data file a run used, identified by its SHA-256."""

    kind: ClassVar[str] = "dataset"

    slug: str = Field(max_length=80, unique=True, index=True)
    path: str = Field(default="")
    sha256: str = Field(max_length=64, index=True)
    rows: int = Field(default=0)
    columns: list[str] | None = _json()


class Run(Entity, table=True):
    """One estimation or evidence run: exact spec, data fingerprint, results, versions and timing."""

    kind: ClassVar[str] = "run"
    # At most one primary run per instrument, also under concurrent writers (a partial unique index, created by
    # migration 0004 on both databases). The PostgreSQL form of its WHERE is added by postgresql_options():
    # naming it here would make SQLAlchemy import its whole PostgreSQL dialect on every start-up, SQLite too.
    __table_args__ = (
        Index(
            "ux_run_one_primary_per_instrument", "instrument_id", unique=True, sqlite_where=text("is_primary")
        ),
    )

    slug: str = Field(max_length=80, unique=True, index=True)
    instrument_id: int | None = Field(default=None, foreign_key="instrument.id", index=True)
    dataset_id: int | None = Field(default=None, foreign_key="dataset.id")
    run_kind: str = Field(default="estimate", max_length=32)
    spec: dict[str, Any] | None = _json()
    results: dict[str, Any] | None = _json()
    versions: dict[str, Any] | None = _json()
    seconds: float = Field(default=0.0)
    # The run the team marked as the one its dossier headline and relevance verdict rest on (at most one per
    # instrument; registry.runs.mark_primary keeps it so).
    is_primary: bool = Field(default=False, sa_column_kwargs={"server_default": false()})


class Plan(Entity, table=True):
    """A pre-analysis plan; once frozen, its content hash is fixed and the row is read-only."""

    kind: ClassVar[str] = "plan"

    slug: str = Field(max_length=80, unique=True, index=True)
    program_id: int = Field(foreign_key="program.id", index=True)
    instrument_id: int | None = Field(default=None, foreign_key="instrument.id")
    title: str = Field(default="")
    content: dict[str, Any] | None = _json()
    state: str = Field(default="draft", max_length=10)
    frozen_at: datetime | None = Field(default=None)
    frozen_by: str = Field(default="", max_length=64)
    sha256: str = Field(default="", max_length=64)


class Comment(Entity, table=True):
    """A remark on any entity, addressed by the entity's UUID."""

    kind: ClassVar[str] = "comment"

    slug: str = Field(max_length=80, unique=True, index=True)
    entity_kind: str = Field(max_length=20)
    entity_uuid: str = Field(max_length=36, index=True)
    author: str = Field(max_length=64)
    body: str = Field(default="")


class AuditEvent(SQLModel, table=True):
    """Append-only record of every change: who, when, what, and the values before and after."""

    __tablename__ = "audit_event"
    __table_args__ = (Index("ix_audit_event_at", "at"),)

    id: int | None = Field(default=None, primary_key=True)
    at: datetime = Field(default_factory=utcnow)
    actor: str = Field(max_length=64)
    action: str = Field(max_length=32)
    entity_kind: str = Field(max_length=20)
    entity_uuid: str = Field(max_length=36, index=True)
    entity_label: str = Field(default="", max_length=300)
    before: dict[str, Any] | None = _json()
    after: dict[str, Any] | None = _json()
    reason: str = Field(default="")


def postgresql_options() -> None:
    """Give the tables their PostgreSQL-only options (imports the PostgreSQL dialect; called before a PostgreSQL
    engine is used and by the migration environment, so the metadata is complete wherever PostgreSQL is)."""
    for index in Run.__table__.indexes:  # type: ignore[attr-defined]
        if index.name == "ux_run_one_primary_per_instrument":
            index.dialect_options["postgresql"]["where"] = text("is_primary")


ENTITY_CLASSES: tuple[type[Entity], ...] = (
    Member,
    Program,
    Instrument,
    Covariate,
    GraphEdge,
    Threat,
    Link,
    Dismissal,
    Rating,
    Study,
    Critique,
    Dataset,
    Run,
    Plan,
    Comment,
)
