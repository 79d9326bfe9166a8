"""Datasets (identified by SHA-256) and runs: what was estimated, on which data, with which software."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from ivdossier.registry import records
from ivdossier.registry.models import Dataset, Instrument, Run


def register_dataset(
    session: Session, *, actor: str, path: str, sha256: str, rows: int, columns: Sequence[str]
) -> Dataset:
    """The dataset row for this file content, created on first use (same content, same row)."""
    existing = session.scalars(select(Dataset).where(Dataset.sha256 == sha256)).first()
    if existing is not None:
        return existing
    dataset = Dataset(slug=f"data-{sha256[:12]}", path=path, sha256=sha256, rows=rows, columns=list(columns))
    return records.create(session, dataset, actor=actor)


def next_run_slug(session: Session, instrument: Instrument | None, run_kind: str) -> str:
    base = f"{instrument.slug if instrument else 'free'}-{run_kind}"[:70]
    taken = set(session.scalars(select(Run.slug).where(Run.slug.startswith(base))))  # type: ignore[attr-defined]
    n = 1
    while f"{base}-{n}" in taken:
        n += 1
    return f"{base}-{n}"


def record_run(
    session: Session,
    *,
    actor: str,
    instrument: str | None,
    run_kind: str,
    spec: Mapping[str, Any],
    results: Mapping[str, Any],
    versions: Mapping[str, Any],
    seconds: float,
    dataset: Dataset | None = None,
) -> Run:
    """Store one run (estimation or evidence check) attached to an instrument."""
    inst = records.get(session, Instrument, instrument) if instrument else None
    run = Run(
        slug=next_run_slug(session, inst, run_kind),
        instrument_id=inst.id if inst else None,
        dataset_id=dataset.id if dataset else None,
        run_kind=run_kind,
        spec=dict(spec),
        results=dict(results),
        versions=dict(versions),
        seconds=seconds,
    )
    return records.create(session, run, actor=actor)


def runs_of(session: Session, instrument: Instrument, run_kind: str | None = None) -> list[Run]:
    query = select(Run).where(Run.instrument_id == instrument.id)
    if run_kind:
        query = query.where(Run.run_kind == run_kind)
    return list(session.scalars(query.order_by(Run.created_at, Run.id)))  # type: ignore[arg-type]


def all_runs(session: Session, instrument: Instrument | None = None) -> list[Run]:
    """Every run, oldest first; only those attached to `instrument` when one is given."""
    query = select(Run)
    if instrument is not None:
        query = query.where(Run.instrument_id == instrument.id)
    return list(session.scalars(query.order_by(Run.created_at, Run.id)))  # type: ignore[arg-type]


def primary_run_of(session: Session, instrument: Instrument) -> Run | None:
    """The run the team marked primary for `instrument`, or None when none is marked."""
    query = select(Run).where(Run.instrument_id == instrument.id, Run.is_primary == True)  # noqa: E712
    return session.scalars(query).first()


def mark_primary(session: Session, *, actor: str, run: str, reason: str = "") -> Run:
    """Mark `run` as its instrument's primary run, unmarking the previous one; both changes are audited."""
    from ivdossier.errors import InvalidInputError

    row = records.get(session, Run, run)
    if row.instrument_id is None:
        raise InvalidInputError(
            f"run {row.slug!r} is attached to no instrument, so it cannot be an instrument's primary run; "
            "rerun it with --attach INSTRUMENT."
        )
    if row.run_kind != "estimate":
        raise InvalidInputError(
            f"run {row.slug!r} is a {row.run_kind} run; only an estimate run can be an instrument's primary run "
            "(see `run list INSTRUMENT`)."
        )
    if row.is_primary:
        return row
    inst = records.get_by_id(session, Instrument, row.instrument_id)
    previous = primary_run_of(session, inst)
    if previous is not None:
        records.edit(
            session,
            previous,
            {"is_primary": False},
            actor=actor,
            action="unmark-primary",
            reason=f"run {row.slug} became the primary run of {inst.slug}",
        )
    return records.edit(session, row, {"is_primary": True}, actor=actor, action="mark-primary", reason=reason)


def clear_primary(session: Session, *, actor: str, instrument: str, reason: str = "") -> Run:
    """Remove the primary mark of `instrument`'s primary run (audited); the dossier then follows the latest run."""
    from ivdossier.errors import InvalidInputError

    inst = records.get(session, Instrument, instrument)
    current = primary_run_of(session, inst)
    if current is None:
        raise InvalidInputError(
            f"instrument {inst.slug!r} has no primary run, so there is no mark to clear "
            f"(see `ivdossier run list {inst.slug}`)."
        )
    return records.edit(
        session, current, {"is_primary": False}, actor=actor, action="unmark-primary", reason=reason
    )


def runs_in_context(
    session: Session, instrument: Instrument | None = None
) -> list[tuple[Run, str | None, Dataset | None]]:
    """`all_runs` with each run's instrument slug and dataset, read in one query (no query per run)."""
    query = (
        select(Run, Instrument.slug, Dataset)
        .outerjoin(Instrument, Run.instrument_id == Instrument.id)  # type: ignore[arg-type]
        .outerjoin(Dataset, Run.dataset_id == Dataset.id)  # type: ignore[arg-type]
    )
    if instrument is not None:
        query = query.where(Run.instrument_id == instrument.id)
    return [
        (run, slug, dataset) for run, slug, dataset in session.execute(query.order_by(Run.created_at, Run.id))
    ]  # type: ignore[arg-type]
