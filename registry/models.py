"""Tables of the registry (SQLAlchemy declarative): one class per entity, every row with a UUID, a slug and a version.

No ``from __future__ import annotations`` here: SQLAlchemy reads the ``Mapped[...]`` annotations as objects
instead of evaluating each one from a string, which keeps this module's import (every command pays it) shorter.
"""

import uuid as uuid_mod
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from datetime import UTC, datetime
from typing import Any, ClassVar

from sqlalchemy import JSON, Boolean, Float, ForeignKey, Index, Integer, String, UniqueConstraint, false, text
from sqlalchemy.orm import DeclarativeBase, Mapped, declared_attr, mapped_column

from ivdossier.registry.sqltypes import UTCDateTime
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
    return mapped_column(JSON, nullable=True)


def _text(length: int | None = None, *, default: str | None = None, **kw: Any) -> Any:
    """A text column: VARCHAR(length) (VARCHAR without one), NOT NULL, with a Python-side default if given."""
    if default is not None:
        kw["default"] = default
    return mapped_column(String(length), nullable=False, **kw)


def _fk(target: str, *, nullable: bool = False, index: bool = False) -> Any:
    return mapped_column(Integer, ForeignKey(target), nullable=nullable, index=index)


class Base(DeclarativeBase):
    """Declarative base of every table. Constructing a row fills each column the caller leaves out from its
    default at once (a new UUID, the clock's time, version 1, "" for text, None for nullable columns), in column
    order, so a new object reads like a stored one before it is flushed (snapshots, labels, validations)."""

    _defaults: ClassVar[tuple[tuple[str, Any, bool], ...] | None] = None

    @declared_attr.directive
    def __tablename__(cls) -> str:
        return cls.__name__.lower()

    def __init__(self, **values: Any) -> None:
        cls = type(self)
        defaults = cls.__dict__.get("_defaults")
        if defaults is None:
            defaults = _column_defaults(cls)
            cls._defaults = defaults
        for key, value, call in defaults:
            if key not in values:
                setattr(self, key, value(None) if call else value)
        for key, value in values.items():
            if not hasattr(cls, key):
                raise TypeError(f"{key!r} is an invalid keyword argument for {cls.__name__}")
            setattr(self, key, value)


def _column_defaults(cls: type[Base]) -> tuple[tuple[str, Any, bool], ...]:
    """(attribute, default, whether to call it) for each column with a default, or nullable, in column order."""
    out: list[tuple[str, Any, bool]] = []
    for prop in cls.__mapper__.column_attrs:
        column = prop.columns[0]
        default = column.default
        if default is not None and default.is_callable:
            out.append((prop.key, default.arg, True))  # type: ignore[attr-defined]  # called as arg(context)
        elif default is not None and default.is_scalar:
            out.append((prop.key, default.arg, False))  # type: ignore[attr-defined]
        elif column.nullable or column.primary_key:
            out.append((prop.key, None, False))
    return tuple(out)


class Entity(Base):
    """Columns every entity carries: surrogate key, UUID, timestamps and an optimistic-locking version."""

    __abstract__ = True

    # sort_order puts these columns first, before the subclass's own, as in every table since schema 0001.
    id: Mapped[int | None] = mapped_column(Integer, primary_key=True, nullable=False, sort_order=-5)
    uuid: Mapped[str] = mapped_column(
        String(36), nullable=False, default=new_uuid, unique=True, index=True, sort_order=-4
    )
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), nullable=False, default=utcnow, sort_order=-3)
    updated_at: Mapped[datetime] = mapped_column(UTCDateTime(), nullable=False, default=utcnow, sort_order=-2)
    version: Mapped[int] = mapped_column(Integer, nullable=False, default=1, sort_order=-1)

    # Human label used in messages and the audit trail; subclasses point it at their slug column.
    label_field: ClassVar[str] = "slug"
    kind: ClassVar[str] = "entity"

    @declared_attr.directive
    def __mapper_args__(cls) -> dict[str, Any]:
        # SQLAlchemy's version counter: an UPDATE based on a stale version matches no row and fails.
        return {"version_id_col": cls.__table__.c.version}

    @property
    def label(self) -> str:
        return str(getattr(self, self.label_field))


class Member(Entity):
    kind: ClassVar[str] = "member"
    label_field: ClassVar[str] = "handle"

    handle: Mapped[str] = _text(64, unique=True, index=True)
    name: Mapped[str] = _text(200, default="")
    email: Mapped[str] = _text(320, default="")


class Program(Entity):
    kind: ClassVar[str] = "program"

    slug: Mapped[str] = _text(64, unique=True, index=True)
    title: Mapped[str] = _text(300)
    question: Mapped[str] = _text(default="")
    treatment: Mapped[str] = _text(200, default="")
    outcome: Mapped[str] = _text(200, default="")
    unit: Mapped[str] = _text(200, default="")
    population: Mapped[str] = _text(default="")
    notes: Mapped[str] = _text(default="")


class Instrument(Entity):
    kind: ClassVar[str] = "instrument"

    slug: Mapped[str] = _text(64, unique=True, index=True)
    program_id: Mapped[int] = _fk("program.id", index=True)
    name: Mapped[str] = _text(300)
    family: Mapped[str] = _text(64, default="", index=True)
    columns: Mapped[list[str] | None] = _json()
    state: Mapped[str] = _text(16, default="proposed")
    description: Mapped[str] = _text(default="")
    claim_relevance: Mapped[str] = _text(default="")
    claim_exclusion: Mapped[str] = _text(default="")
    claim_exogeneity: Mapped[str] = _text(default="")
    claim_monotonicity: Mapped[str] = _text(default="")


class Covariate(Entity):
    """A variable the team declares in a program's causal graph, measured in the data or not."""

    kind: ClassVar[str] = "covariate"
    __table_args__ = (UniqueConstraint("program_id", "name"),)

    slug: Mapped[str] = _text(140, unique=True, index=True)
    program_id: Mapped[int] = _fk("program.id", index=True)
    name: Mapped[str] = _text(100)
    measured: Mapped[bool] = mapped_column(Boolean, nullable=False, default=True)
    description: Mapped[str] = _text(default="")


class GraphEdge(Entity):
    """An edge a user adds to a program's causal graph by hand (beyond roles and threat fragments).

    ``instrument_id`` scopes it: None draws it in every instrument's graph of the program, an instrument's id
    only in that instrument's graph (so an edge into one instrument's column leaves its siblings alone).
    """

    kind: ClassVar[str] = "edge"
    __table_args__ = (
        UniqueConstraint("program_id", "instrument_id", "source", "target", name="uq_graphedge_scope_ends"),
    )

    slug: Mapped[str] = _text(240, unique=True, index=True)
    program_id: Mapped[int] = _fk("program.id", index=True)
    instrument_id: Mapped[int | None] = _fk("instrument.id", nullable=True, index=True)
    source: Mapped[str] = _text(100)
    target: Mapped[str] = _text(100)
    note: Mapped[str] = _text(default="")


class Threat(Entity):
    """A catalogue entry: built in (shipped data files) or written by the team."""

    kind: ClassVar[str] = "threat"
    label_field: ClassVar[str] = "code"

    code: Mapped[str] = _text(32, unique=True, index=True)
    title: Mapped[str] = _text(300)
    condition: Mapped[str] = _text(16, index=True)
    mechanism: Mapped[str] = _text(64, default="")
    families: Mapped[list[str] | None] = _json()
    description: Mapped[str] = _text(default="")
    fragment: Mapped[dict[str, Any] | None] = _json()
    testability: Mapped[str] = _text(20, default="argument-only")
    checks: Mapped[list[str] | None] = _json()
    mitigations: Mapped[list[str] | None] = _json()
    references: Mapped[list[str] | None] = _json()
    origin: Mapped[str] = _text(10, default="team")  # "builtin" or "team"
    catalog_version: Mapped[str] = _text(20, default="")
    # The catalogue's "kind" ("kind" names the entity class here): "condition" (attacks relevance, exclusion,
    # exogeneity or monotonicity) or "reading" (what the estimate means, its uncertainty, how the specification
    # was chosen). Added in schema 0002.
    threat_kind: Mapped[str] = _text(12, default="condition", server_default="condition")
    # For a built-in code that was merged or replaced: the successor's code (links were carried over to it).
    retired_into: Mapped[str] = _text(32, default="", server_default="")


class Link(Entity):
    """A threat attached to one instrument, with the team's current state and argument."""

    kind: ClassVar[str] = "link"
    __table_args__ = (UniqueConstraint("instrument_id", "threat_id"),)

    slug: Mapped[str] = _text(100, unique=True, index=True)
    instrument_id: Mapped[int] = _fk("instrument.id", index=True)
    threat_id: Mapped[int] = _fk("threat.id", index=True)
    state: Mapped[str] = _text(12, default="open")
    argument: Mapped[str] = _text(default="")
    evidence: Mapped[str] = _text(default="")


class Dismissal(Entity):
    """A family-level threat the team has looked at for one instrument and judged not to apply."""

    kind: ClassVar[str] = "dismissal"
    __table_args__ = (UniqueConstraint("instrument_id", "threat_id"),)

    slug: Mapped[str] = _text(100, unique=True, index=True)
    instrument_id: Mapped[int] = _fk("instrument.id", index=True)
    threat_id: Mapped[int] = _fk("threat.id", index=True)
    reason: Mapped[str] = _text(default="")


class Rating(Entity):
    """One reviewer's likelihood and severity (1-5) for one link."""

    kind: ClassVar[str] = "rating"
    __table_args__ = (UniqueConstraint("link_id", "member_id"),)

    slug: Mapped[str] = _text(170, unique=True, index=True)
    link_id: Mapped[int] = _fk("link.id", index=True)
    member_id: Mapped[int] = _fk("member.id", index=True)
    likelihood: Mapped[int] = mapped_column(Integer, nullable=False)
    severity: Mapped[int] = mapped_column(Integer, nullable=False)
    comment: Mapped[str] = _text(default="")


class Study(Entity):
    """A past or published study that used an instrument, with what it reported."""

    kind: ClassVar[str] = "study"
    label_field: ClassVar[str] = "key"

    key: Mapped[str] = _text(120, unique=True, index=True)
    entry_type: Mapped[str] = _text(32, default="article")
    authors: Mapped[str] = _text(default="")
    title: Mapped[str] = _text(default="")
    year: Mapped[int | None] = mapped_column(Integer, nullable=True)
    venue: Mapped[str] = _text(default="")
    doi: Mapped[str] = _text(200, default="")
    families: Mapped[list[str] | None] = _json()
    instruments: Mapped[list[str] | None] = _json()  # instrument slugs this study used or speaks to
    reported: Mapped[dict[str, Any] | None] = (
        _json()
    )  # point estimate, se, first-stage F and kind, n, clusters ...
    extra: Mapped[dict[str, Any] | None] = _json()  # other BibTeX fields, kept for a faithful round trip
    # a published per-variant summary table attached for re-analysis: source, sha256, columns and rows as read
    variant_table: Mapped[dict[str, Any] | None] = _json()


class Critique(Entity):
    """A catalogue threat raised against a study, optionally by another study."""

    kind: ClassVar[str] = "critique"
    __table_args__ = (UniqueConstraint("study_id", "threat_id", "raised_by_id"),)

    slug: Mapped[str] = _text(280, unique=True, index=True)
    study_id: Mapped[int] = _fk("study.id", index=True)
    threat_id: Mapped[int] = _fk("threat.id", index=True)
    raised_by_id: Mapped[int | None] = _fk("study.id", nullable=True)
    note: Mapped[str] = _text(default="")


class Dataset(Entity):
    """A data file a run used, identified by its SHA-256."""

    kind: ClassVar[str] = "dataset"

    slug: Mapped[str] = _text(80, unique=True, index=True)
    path: Mapped[str] = _text(default="")
    sha256: Mapped[str] = _text(64, index=True)
    rows: Mapped[int] = mapped_column(Integer, nullable=False, default=0)
    columns: Mapped[list[str] | None] = _json()


class Run(Entity):
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

    slug: Mapped[str] = _text(80, unique=True, index=True)
    instrument_id: Mapped[int | None] = _fk("instrument.id", nullable=True, index=True)
    dataset_id: Mapped[int | None] = _fk("dataset.id", nullable=True)
    run_kind: Mapped[str] = _text(32, default="estimate")
    spec: Mapped[dict[str, Any] | None] = _json()
    results: Mapped[dict[str, Any] | None] = _json()
    versions: Mapped[dict[str, Any] | None] = _json()
    seconds: Mapped[float] = mapped_column(Float, nullable=False, default=0.0)
    # The run the team marked as the one its dossier headline and relevance verdict rest on (at most one per
    # instrument; registry.runs.mark_primary keeps it so).
    is_primary: Mapped[bool] = mapped_column(Boolean, nullable=False, default=False, server_default=false())


class Plan(Entity):
    """A pre-analysis plan; once frozen, its content hash is fixed and the row is read-only."""

    kind: ClassVar[str] = "plan"

    slug: Mapped[str] = _text(80, unique=True, index=True)
    program_id: Mapped[int] = _fk("program.id", index=True)
    instrument_id: Mapped[int | None] = _fk("instrument.id", nullable=True)
    title: Mapped[str] = _text(default="")
    content: Mapped[dict[str, Any] | None] = _json()
    state: Mapped[str] = _text(10, default="draft")
    frozen_at: Mapped[datetime | None] = mapped_column(UTCDateTime(), nullable=True)
    frozen_by: Mapped[str] = _text(64, default="")
    sha256: Mapped[str] = _text(64, default="")


class Comment(Entity):
    """A remark on any entity, addressed by the entity's UUID."""

    kind: ClassVar[str] = "comment"

    slug: Mapped[str] = _text(80, unique=True, index=True)
    entity_kind: Mapped[str] = _text(20)
    entity_uuid: Mapped[str] = _text(36, index=True)
    author: Mapped[str] = _text(64)
    body: Mapped[str] = _text(default="")


class AuditEvent(Base):
    """Append-only record of every change: who, when, what, and the values before and after."""

    __tablename__ = "audit_event"
    __table_args__ = (Index("ix_audit_event_at", "at"),)

    id: Mapped[int | None] = mapped_column(Integer, primary_key=True, nullable=False)
    at: Mapped[datetime] = mapped_column(UTCDateTime(), nullable=False, default=utcnow)
    actor: Mapped[str] = _text(64)
    action: Mapped[str] = _text(32)
    entity_kind: Mapped[str] = _text(20)
    entity_uuid: Mapped[str] = _text(36, index=True)
    entity_label: Mapped[str] = _text(300, default="")
    before: Mapped[dict[str, Any] | None] = _json()
    after: Mapped[dict[str, Any] | None] = _json()
    reason: Mapped[str] = _text(default="")


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
