"""Programs, candidate instruments and their lifecycle, members, and a program's declared covariates."""

from __future__ import annotations

from collections.abc import Sequence

from sqlalchemy import select
from sqlalchemy.orm import Session

from ivdossier.errors import ConflictError, InvalidInputError
from ivdossier.registry import records
from ivdossier.registry.models import (
    CONDITIONS,
    LIFECYCLE_MOVES,
    LIFECYCLE_STATES,
    Covariate,
    GraphEdge,
    Instrument,
    Member,
    Program,
)

EMAIL_CHARS = set("@.")


def add_program(
    session: Session,
    *,
    actor: str,
    slug: str,
    title: str,
    question: str = "",
    treatment: str = "",
    outcome: str = "",
    unit: str = "",
    population: str = "",
    notes: str = "",
) -> Program:
    records.check_slug(slug, what="program")
    for field, value in {
        "title": title,
        "question": question,
        "notes": notes,
        "population": population,
    }.items():
        records.check_text(value, field=field)
    if not title.strip():
        raise InvalidInputError("a program needs a title; pass --title 'Does X reduce Y?'.")
    program = Program(
        slug=slug,
        title=title,
        question=question,
        treatment=treatment,
        outcome=outcome,
        unit=unit,
        population=population,
        notes=notes,
    )
    return records.create(session, program, actor=actor)


def add_instrument(
    session: Session,
    *,
    actor: str,
    program: str,
    slug: str,
    name: str,
    family: str = "",
    columns: Sequence[str] = (),
    description: str = "",
    claims: dict[str, str] | None = None,
) -> Instrument:
    """Register a candidate instrument in a program; it starts in the 'proposed' state."""
    records.check_slug(slug, what="instrument")
    prog = records.get(session, Program, program)
    if not name.strip():
        raise InvalidInputError("an instrument needs a name; pass --name 'Fibre roll-out wave'.")
    if family:
        records.check_slug(family, what="family")
    inst = Instrument(
        slug=slug,
        program_id=prog.id or 0,
        name=name,
        family=family,
        columns=[c for c in columns],
        description=records.check_text(description, field="description"),
    )
    for condition, text in (claims or {}).items():
        _check_condition(condition)
        setattr(inst, f"claim_{condition}", records.check_text(text, field=f"{condition} claim"))
    return records.create(session, inst, actor=actor)


def _check_condition(condition: str) -> str:
    if condition not in CONDITIONS:
        raise InvalidInputError(f"unknown condition {condition!r}; use one of: {', '.join(CONDITIONS)}.")
    return condition


def set_claim(
    session: Session,
    *,
    actor: str,
    instrument: str,
    condition: str,
    text: str,
    expected_version: int | None = None,
) -> Instrument:
    """Write or replace the team's argument for one condition."""
    inst = records.get(session, Instrument, instrument)
    _check_condition(condition)
    records.check_text(text, field=f"{condition} claim")
    return records.edit(
        session,
        inst,
        {f"claim_{condition}": text},
        actor=actor,
        expected_version=expected_version,
        action="claim",
    )


def move_instrument(
    session: Session,
    *,
    actor: str,
    instrument: str,
    to: str,
    reason: str,
    expected_version: int | None = None,
) -> Instrument:
    """Move an instrument along its lifecycle; every move needs a reason, kept in the audit trail."""
    inst = records.get(session, Instrument, instrument)
    if to not in LIFECYCLE_STATES:
        raise InvalidInputError(f"unknown state {to!r}; use one of: {', '.join(LIFECYCLE_STATES)}.")
    allowed = LIFECYCLE_MOVES[inst.state]
    if to not in allowed:
        raise InvalidInputError(
            f"instrument {inst.slug!r} is {inst.state}; it can move to {', '.join(allowed)}, not {to}."
        )
    if not reason.strip():
        raise InvalidInputError("every lifecycle move needs a reason; pass --reason '...'.")
    records.check_text(reason, field="reason")
    return records.edit(
        session,
        inst,
        {"state": to},
        actor=actor,
        expected_version=expected_version,
        action="move",
        reason=reason,
    )


def instruments_of(session: Session, program: Program) -> list[Instrument]:
    return list(
        session.scalars(
            select(Instrument).where(Instrument.program_id == program.id).order_by(Instrument.slug)
        )
    )


def check_writer(session: Session, actor: str) -> None:
    """Refuse a write by someone who is not a member, once the registry has members.

    The rule every write of the command line follows: while a registry has no members anyone may write (that is
    how the first member is added); from then on the acting handle (--as, $IVDOSSIER_USER, else the
    operating-system user) must be a member, so a mistyped --as cannot put an unknown author into the audit trail.
    Rating a link always needs a member (the rating is stored against the member).
    """
    handles = [str(h) for h in session.scalars(select(Member.handle).order_by(Member.handle)).all()]
    if not handles or actor in handles:
        return
    shown = ", ".join(handles[:8]) + (f" and {len(handles) - 8} more" if len(handles) > 8 else "")
    raise InvalidInputError(
        f"{actor!r} is not a member of this registry (members: {shown}), so it may not write; "
        f"act as a member with --as HANDLE, or have a member add you: "
        f"`ivdossier --as {handles[0]} member add {actor}`."
    )


def add_member(session: Session, *, actor: str, handle: str, name: str = "", email: str = "") -> Member:
    records.check_slug(handle, what="member handle")
    if email and not (set(email) >= EMAIL_CHARS and " " not in email):
        raise InvalidInputError(
            f"e-mail {email!r} does not look like an address; pass --email name@example.org."
        )
    return records.create(session, Member(handle=handle, name=name, email=email), actor=actor)


def add_covariate(
    session: Session, *, actor: str, program: str, name: str, measured: bool = True, description: str = ""
) -> Covariate:
    """Declare a variable of the program's causal graph (measured in the data or not)."""
    prog = records.get(session, Program, program)
    if not name or not name.replace("_", "").isalnum():
        raise InvalidInputError(
            f"covariate name {name!r} must be letters, digits and underscores, e.g. 'age'."
        )
    if name in {"Z", "X", "Y", "U"}:
        raise InvalidInputError(f"covariate name {name!r} is reserved for a graph role; choose another name.")
    cov = Covariate(
        slug=f"{prog.slug}--{name.lower()}"[:140],
        program_id=prog.id or 0,
        name=name,
        measured=measured,
        description=description,
    )
    return records.create(session, cov, actor=actor)


def covariates_of(session: Session, program: Program) -> list[Covariate]:
    return list(
        session.scalars(select(Covariate).where(Covariate.program_id == program.id).order_by(Covariate.name))
    )


def _edge_slug(program: Program, source: str, target: str, instrument: Instrument | None) -> str:
    scope = f"@{instrument.slug}" if instrument is not None else ""
    return f"{program.slug}--{source}--{target}{scope}"[:240].lower()


def add_edge(
    session: Session,
    *,
    actor: str,
    program: str,
    source: str,
    target: str,
    note: str = "",
    instrument: str | None = None,
) -> GraphEdge:
    """Store an edge of the team's own: in every instrument's graph of the program, or (``instrument``) only in
    that instrument's. Storage only: ``ivdossier.workflows.graph_edits`` checks nodes and cycles first."""
    prog = records.get(session, Program, program)
    if source == target:
        raise InvalidInputError(f"an edge from {source!r} to itself would make the graph cyclic.")
    inst = None
    if instrument is not None:
        inst = records.get(session, Instrument, instrument)
        if inst.program_id != prog.id:
            raise InvalidInputError(
                f"instrument {inst.slug!r} is not in program {prog.slug!r}; scope the edge to one of its own "
                "instruments or leave --instrument out."
            )
    if find_edge(session, prog, source, target, inst) is not None:
        where = f"instrument {inst.slug!r}" if inst is not None else f"program {prog.slug!r}"
        raise ConflictError(f"edge {source} -> {target} is already in the graph of {where}; nothing to add.")
    edge = GraphEdge(
        slug=_edge_slug(prog, source, target, inst),
        program_id=prog.id or 0,
        instrument_id=inst.id if inst is not None else None,
        source=source,
        target=target,
        note=records.check_text(note, field="note"),
    )
    return records.create(session, edge, actor=actor)


def find_edge(
    session: Session, program: Program, source: str, target: str, instrument: Instrument | None = None
) -> GraphEdge | None:
    """The team edge source -> target of this scope (program-wide when ``instrument`` is None), if stored."""
    column = GraphEdge.instrument_id
    scope = column.is_(None) if instrument is None else column == instrument.id  # type: ignore[union-attr]
    return session.scalars(
        select(GraphEdge).where(
            GraphEdge.program_id == program.id,
            GraphEdge.source == source,
            GraphEdge.target == target,
            scope,
        )
    ).first()


def remove_edge(session: Session, *, actor: str, edge: GraphEdge, reason: str = "") -> None:
    """Delete a team edge (audited with its last content)."""
    records.delete(session, edge, actor=actor, reason=reason)


def reverse_edge(session: Session, *, actor: str, edge: GraphEdge, reason: str = "") -> GraphEdge:
    """Turn a team edge round (audited as a 'reverse' edit of its ends)."""
    prog = records.get_by_id(session, Program, edge.program_id)
    inst = records.get_by_id(session, Instrument, edge.instrument_id) if edge.instrument_id else None
    if find_edge(session, prog, edge.target, edge.source, inst) is not None:
        raise ConflictError(
            f"edge {edge.target} -> {edge.source} is already stored in the same scope; remove "
            f"{edge.source} -> {edge.target} instead of reversing it."
        )
    changes = {
        "source": edge.target,
        "target": edge.source,
        "slug": _edge_slug(prog, edge.target, edge.source, inst),
    }
    return records.edit(session, edge, changes, actor=actor, action="reverse", reason=reason)


def edges_of(session: Session, program: Program) -> list[GraphEdge]:
    """Every team edge of the program, program-wide and instrument-scoped."""
    return list(
        session.scalars(select(GraphEdge).where(GraphEdge.program_id == program.id).order_by(GraphEdge.slug))
    )


def edges_for(session: Session, instrument: Instrument) -> list[GraphEdge]:
    """The team edges drawn in one instrument's graph: the program-wide ones and those scoped to it."""
    return [
        e
        for e in edges_of(session, records.get_by_id(session, Program, instrument.program_id))
        if e.instrument_id is None or e.instrument_id == instrument.id
    ]
