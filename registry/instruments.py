"""Programs, candidate instruments and their lifecycle, members, and a program's declared covariates."""

from __future__ import annotations

from collections.abc import Sequence

from sqlmodel import Session, select

from ivdossier.errors import InvalidInputError
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
        session.exec(select(Instrument).where(Instrument.program_id == program.id).order_by(Instrument.slug))
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
        session.exec(select(Covariate).where(Covariate.program_id == program.id).order_by(Covariate.name))
    )


def add_edge(
    session: Session, *, actor: str, program: str, source: str, target: str, note: str = ""
) -> GraphEdge:
    """Add an edge of the team's own to the program's causal graph."""
    prog = records.get(session, Program, program)
    if source == target:
        raise InvalidInputError(f"an edge from {source!r} to itself would make the graph cyclic.")
    edge = GraphEdge(
        slug=f"{prog.slug}--{source}--{target}"[:240].lower(),
        program_id=prog.id or 0,
        source=source,
        target=target,
        note=note,
    )
    return records.create(session, edge, actor=actor)


def edges_of(session: Session, program: Program) -> list[GraphEdge]:
    return list(
        session.exec(select(GraphEdge).where(GraphEdge.program_id == program.id).order_by(GraphEdge.slug))
    )
