"""Catalogue threats in the registry, their links to instruments, reviewers' ratings and family propagation."""

from __future__ import annotations

import uuid
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from ivdossier.errors import InvalidInputError
from ivdossier.registry import records
from ivdossier.registry.models import (
    CONDITIONS,
    LINK_STATES,
    READING_ASPECTS,
    Critique,
    Dismissal,
    Instrument,
    Link,
    Member,
    Rating,
    Threat,
)

#: Namespace of built-in catalogue identities: every registry derives the same UUID from an entry's code, so an
#: export from any registry names the built-in threats as any other registry does.
BUILTIN_NAMESPACE = uuid.UUID("d83e9d89-a6e5-4a1a-8aee-3b2bef0888a9")

#: The one timestamp every registry gives a built-in entry (created or refreshed by a catalogue release): the
#: entries' content is the same everywhere, so their bookkeeping is too.
BUILTIN_STAMP = datetime(2026, 12, 1, tzinfo=UTC)


def builtin_uuid(code: str) -> str:
    """The identity of the built-in catalogue entry ``code``, the same on every registry."""
    return str(uuid.uuid5(BUILTIN_NAMESPACE, code.upper()))


THREAT_FIELDS = (
    "title",
    "condition",
    "mechanism",
    "families",
    "description",
    "fragment",
    "testability",
    "checks",
    "mitigations",
    "references",
)


#: Audit action of a link, dismissal or critique moved from a retired built-in code to its successor.
CARRY_ACTION = "carry-to-successor"


def _values(entry: Mapping[str, Any]) -> dict[str, Any]:
    values = {f: entry.get(f) for f in THREAT_FIELDS}
    condition = str(entry.get("condition", ""))
    values["threat_kind"] = str(
        entry.get("kind") or ("reading" if condition in READING_ASPECTS else "condition")
    )
    return values


def sync_catalog(
    session: Session,
    entries: Iterable[Mapping[str, Any]],
    *,
    version: str,
    actor: str,
    retired: Mapping[str, str] | None = None,
) -> int:
    """Add built-in entries the registry lacks, refresh older built-ins and retire merged or replaced codes.

    ``retired`` maps a retired built-in code to its successor: links, dismissals and critiques that point at
    the retired code are carried over to the successor (each move is an audit event) and the retired row stays,
    marked with ``retired_into``, so history and old exports still resolve. Team entries are never touched.
    Returns the number of entries added, refreshed or retired.
    """
    existing = {t.code: t for t in session.scalars(select(Threat))}
    changed = 0
    for entry in entries:
        code = str(entry["code"])
        values = _values(entry)
        current = existing.get(code)
        if current is None:
            threat = Threat(
                code=code,
                uuid=builtin_uuid(code),
                created_at=BUILTIN_STAMP,
                updated_at=BUILTIN_STAMP,
                origin="builtin",
                catalog_version=version,
                **values,
            )
            records.create(session, threat, actor=actor, reason=f"built-in catalogue {version}")
            existing[code] = threat
            changed += 1
        elif current.origin == "builtin" and current.catalog_version != version:
            records.edit(
                session,
                current,
                {**values, "catalog_version": version, "retired_into": ""},
                actor=actor,
                action="catalog-upgrade",
                reason=f"built-in catalogue {current.catalog_version} -> {version}",
            )
            _stamp(session, current)
            changed += 1
    for old_code, new_code in sorted((retired or {}).items()):
        old = existing.get(old_code)
        new = existing.get(new_code)
        if old is None or old.origin != "builtin" or new is None or old.retired_into == new_code:
            continue
        carry_to_successor(session, old, new, actor=actor, version=version)
        records.edit(
            session,
            old,
            {"retired_into": new_code, "catalog_version": version},
            actor=actor,
            action="catalog-retire",
            reason=f"built-in catalogue {version}: {old_code} was merged into or replaced by {new_code}",
        )
        _stamp(session, old)
        changed += 1
    return changed


def _stamp(session: Session, threat: Threat) -> None:
    """Give a built-in entry the catalogue's timestamp after an edit (which stamped it with the clock)."""
    threat.updated_at = BUILTIN_STAMP
    session.add(threat)
    session.flush()


def carry_to_successor(session: Session, old: Threat, new: Threat, *, actor: str, version: str) -> int:
    """Move every link, dismissal and critique of ``old`` to ``new``; return how many rows moved or merged.

    A link whose instrument already has a link to ``new`` is merged into that link: its argument and evidence
    are appended (with the old code and state named), its ratings move unless the reviewer already rated the
    successor, and the old link is deleted. Every step is an audit event with the reason.
    """
    reason = f"catalogue {version}: {old.code} was merged into or replaced by {new.code}"
    moved = 0
    for link in list(session.scalars(select(Link).where(Link.threat_id == old.id))):
        inst = records.get_by_id(session, Instrument, link.instrument_id)
        target = session.scalars(
            select(Link).where(Link.instrument_id == link.instrument_id, Link.threat_id == new.id)
        ).first()
        if target is None:
            records.edit(
                session,
                link,
                {"threat_id": new.id, "slug": link_slug(inst, new)},
                actor=actor,
                action=CARRY_ACTION,
                reason=reason,
            )
        else:
            note = f"[carried from {old.code}, state {link.state}]"
            changes = {
                name: (getattr(target, name) + "\n\n" if getattr(target, name) else "")
                + f"{note} {getattr(link, name)}"
                for name in ("argument", "evidence")
                if getattr(link, name).strip()
            }
            if changes:
                records.edit(session, target, changes, actor=actor, action=CARRY_ACTION, reason=reason)
            rated = {r.member_id for r in session.scalars(select(Rating).where(Rating.link_id == target.id))}
            for rating in list(session.scalars(select(Rating).where(Rating.link_id == link.id))):
                if rating.member_id in rated:
                    records.delete(session, rating, actor=actor, reason=f"{reason}; reviewer rated both")
                else:
                    records.edit(
                        session,
                        rating,
                        {
                            "link_id": target.id,
                            "slug": f"{target.slug}--{rating.slug.rsplit('--', 1)[-1]}"[:170],
                        },
                        actor=actor,
                        action=CARRY_ACTION,
                        reason=reason,
                    )
            records.delete(session, link, actor=actor, reason=f"{reason}; merged into {target.slug}")
        moved += 1
    for dismissal in list(session.scalars(select(Dismissal).where(Dismissal.threat_id == old.id))):
        clash = session.scalars(
            select(Dismissal).where(
                Dismissal.instrument_id == dismissal.instrument_id, Dismissal.threat_id == new.id
            )
        ).first()
        linked = session.scalars(
            select(Link).where(Link.instrument_id == dismissal.instrument_id, Link.threat_id == new.id)
        ).first()
        if clash is not None or linked is not None:
            records.delete(session, dismissal, actor=actor, reason=f"{reason}; successor already handled")
        else:
            inst = records.get_by_id(session, Instrument, dismissal.instrument_id)
            records.edit(
                session,
                dismissal,
                {"threat_id": new.id, "slug": link_slug(inst, new)},
                actor=actor,
                action=CARRY_ACTION,
                reason=reason,
            )
        moved += 1
    for critique in list(session.scalars(select(Critique).where(Critique.threat_id == old.id))):
        clash = session.scalars(
            select(Critique).where(
                Critique.study_id == critique.study_id,
                Critique.threat_id == new.id,
                Critique.raised_by_id == critique.raised_by_id,
            )
        ).first()
        if clash is not None:
            records.delete(session, critique, actor=actor, reason=f"{reason}; successor already raised")
        else:
            records.edit(
                session,
                critique,
                {
                    "threat_id": new.id,
                    "slug": critique.slug.replace(f"--{old.code}--", f"--{new.code}--")[:280],
                },
                actor=actor,
                action=CARRY_ACTION,
                reason=reason,
            )
        moved += 1
    return moved


def add_team_threat(session: Session, *, actor: str, entry: Mapping[str, Any]) -> Threat:
    """Store a team-written catalogue entry (its code must not collide with a built-in one)."""
    code = str(entry.get("code", ""))
    if not code.startswith("T-"):
        raise InvalidInputError(
            f"team threat codes start with 'T-' (got {code!r}); built-in codes are reserved."
        )
    condition = str(entry.get("condition", ""))
    allowed = CONDITIONS + READING_ASPECTS
    if condition not in allowed:
        raise InvalidInputError(f"unknown condition {condition!r}; use one of: {', '.join(allowed)}.")
    values = {k: v for k, v in _values(entry).items() if v is not None}
    return records.create(session, Threat(code=code, origin="team", **values), actor=actor)


def threat_by_code(session: Session, code: str) -> Threat:
    """The threat whose code is ``code`` in any letter case ("dg-e01" finds DG-E01); an exact match wins when two
    team codes differ only in case."""
    exact = records.find(session, Threat, code)
    if exact is not None:
        return exact
    same = [t for t in session.scalars(select(Threat)) if t.code.casefold() == code.casefold()]
    if len(same) == 1:
        return same[0]
    if len(same) > 1:
        raise InvalidInputError(
            f"threat code {code!r} matches {', '.join(t.code for t in same)} in different letter cases; "
            "type the code exactly."
        )
    return records.get(session, Threat, code)


def current_threat(session: Session, code: str) -> Threat:
    """The threat with ``code``; a retired built-in code is refused with its successor named."""
    threat = threat_by_code(session, code)
    if threat.retired_into:
        raise InvalidInputError(
            f"threat {code} was merged into or replaced by {threat.retired_into}; use {threat.retired_into}."
        )
    return threat


def link_slug(instrument: Instrument, threat: Threat) -> str:
    return f"{instrument.slug}--{threat.code.lower()}"


def _check_state(state: str) -> str:
    if state not in LINK_STATES:
        raise InvalidInputError(f"unknown link state {state!r}; use one of: {', '.join(LINK_STATES)}.")
    return state


def link_threat(
    session: Session,
    *,
    actor: str,
    instrument: str,
    code: str,
    state: str = "open",
    argument: str = "",
    evidence: str = "",
) -> Link:
    """Attach a catalogue threat to an instrument."""
    inst = records.get(session, Instrument, instrument)
    threat = current_threat(session, code)
    _check_state(state)
    link = Link(
        slug=link_slug(inst, threat),
        instrument_id=inst.id or 0,
        threat_id=threat.id or 0,
        state=state,
        argument=records.check_text(argument, field="argument"),
        evidence=records.check_text(evidence, field="evidence"),
    )
    return records.create(session, link, actor=actor)


def set_link(
    session: Session,
    *,
    actor: str,
    link: str,
    state: str | None = None,
    argument: str | None = None,
    evidence: str | None = None,
    expected_version: int | None = None,
) -> Link:
    """Change a link's state, argument or evidence (only the fields given)."""
    obj = records.get(session, Link, link.lower())  # link slugs hold the code in lower case
    changes: dict[str, Any] = {}
    if state is not None:
        changes["state"] = _check_state(state)
    if argument is not None:
        changes["argument"] = records.check_text(argument, field="argument")
    if evidence is not None:
        changes["evidence"] = records.check_text(evidence, field="evidence")
    if not changes:
        raise InvalidInputError("nothing to change; pass --state, --argument or --evidence.")
    return records.edit(session, obj, changes, actor=actor, expected_version=expected_version)


def links_of(session: Session, instrument: Instrument) -> list[tuple[Link, Threat]]:
    rows = session.execute(
        select(Link, Threat)
        .where(Link.instrument_id == instrument.id, Link.threat_id == Threat.id)
        .order_by(Threat.code)
    )
    return [(link, threat) for link, threat in rows]


def rate_link(
    session: Session, *, actor: str, link: str, likelihood: int, severity: int, comment: str = ""
) -> Rating:
    """Record (or replace) the acting member's likelihood and severity for a link."""
    obj = records.get(session, Link, link.lower())  # any letter case
    member = records.find(session, Member, actor)
    if member is None:
        raise InvalidInputError(
            f"{actor!r} is not a member of this registry; add yourself with `ivdossier member add {actor}` "
            "or rate with --as HANDLE."
        )
    for name, value in (("likelihood", likelihood), ("severity", severity)):
        if not 1 <= value <= 5:
            raise InvalidInputError(f"{name} must be a whole number from 1 to 5, got {value}.")
    records.check_text(comment, field="comment")
    existing = session.scalars(
        select(Rating).where(Rating.link_id == obj.id, Rating.member_id == member.id)
    ).first()
    if existing is not None:
        return records.edit(
            session,
            existing,
            {"likelihood": likelihood, "severity": severity, "comment": comment},
            actor=actor,
        )
    rating = Rating(
        slug=f"{obj.slug}--{member.handle}"[:170],
        link_id=obj.id or 0,
        member_id=member.id or 0,
        likelihood=likelihood,
        severity=severity,
        comment=comment,
    )
    return records.create(session, rating, actor=actor)


@dataclass(frozen=True)
class RatingSummary:
    """Each reviewer's rating of one link, the team means and how much the reviewers disagree."""

    link: str
    code: str
    title: str
    ratings: tuple[tuple[str, int, int, str], ...]  # (handle, likelihood, severity, comment)
    mean_likelihood: float | None
    mean_severity: float | None
    spread: float  # largest range of likelihood or severity across reviewers

    def to_dict(self) -> dict[str, Any]:
        return {
            "link": self.link,
            "code": self.code,
            "title": self.title,
            "ratings": [
                {"member": h, "likelihood": lik, "severity": sev, "comment": c}
                for h, lik, sev, c in self.ratings
            ],
            "mean_likelihood": self.mean_likelihood,
            "mean_severity": self.mean_severity,
            "spread": self.spread,
        }


def rating_summaries(session: Session, instrument: Instrument) -> list[RatingSummary]:
    """Per link of the instrument, the ratings and disagreement; most disputed links first."""
    import statistics  # only the review needs it (kept out of every command's start-up)

    out = []
    by_link: dict[int, list[tuple[str, int, int, str]]] = {}
    every_rating = (
        select(Rating, Member.handle)
        .where(Rating.member_id == Member.id, Rating.link_id == Link.id, Link.instrument_id == instrument.id)
        .order_by(Member.handle)
    )  # one query for all the instrument's links, not one per link
    for r, handle in session.execute(every_rating):
        by_link.setdefault(r.link_id, []).append((handle, r.likelihood, r.severity, r.comment))
    for link, threat in links_of(session, instrument):
        ratings = tuple(by_link.get(link.id, ()))
        liks = [r[1] for r in ratings]
        sevs = [r[2] for r in ratings]
        spread = float(max(max(liks) - min(liks), max(sevs) - min(sevs))) if ratings else 0.0
        out.append(
            RatingSummary(
                link=link.slug,
                code=threat.code,
                title=threat.title,
                ratings=ratings,
                mean_likelihood=statistics.fmean(liks) if liks else None,
                mean_severity=statistics.fmean(sevs) if sevs else None,
                spread=spread,
            )
        )
    out.sort(key=lambda s: (-s.spread, -(s.mean_severity or 0.0), s.code))
    return out


def unrated_links(session: Session, *, member: str, instrument: Instrument | None = None) -> list[str]:
    """Slugs of the links the member has not rated yet (optionally within one instrument), in slug order."""
    m = records.get(session, Member, member)
    rated = select(Rating.link_id).where(Rating.member_id == m.id)
    query = select(Link.slug).where(Link.id.not_in(rated)).order_by(Link.slug)  # type: ignore[union-attr]
    if instrument is not None:
        query = query.where(Link.instrument_id == instrument.id)
    return list(session.scalars(query))


def dismiss(session: Session, *, actor: str, instrument: str, code: str, reason: str) -> Dismissal:
    """Record that a threat raised on a sibling instrument does not apply to this one."""
    inst = records.get(session, Instrument, instrument)
    threat = current_threat(session, code)
    if not reason.strip():
        raise InvalidInputError("a dismissal needs a reason; pass --reason '...'.")
    obj = Dismissal(
        slug=link_slug(inst, threat), instrument_id=inst.id or 0, threat_id=threat.id or 0, reason=reason
    )
    return records.create(session, obj, actor=actor, reason=reason)


@dataclass(frozen=True)
class RaisedElsewhere:
    """A threat linked to other instruments of the same family and not yet addressed here."""

    code: str
    title: str
    condition: str
    raised_on: tuple[str, ...]  # the first few sibling instruments, by slug
    count: int  # how many sibling instruments carry the link

    def to_dict(self) -> dict[str, Any]:
        return {
            "code": self.code,
            "title": self.title,
            "condition": self.condition,
            "raised_on": list(self.raised_on),
            "count": self.count,
        }


RAISED_ON_SHOWN = 5


def raised_elsewhere(session: Session, instrument: Instrument) -> list[RaisedElsewhere]:
    """Family propagation: threats linked on siblings of the same family, until linked or dismissed here."""
    if not instrument.family:
        return []
    linked_here = select(Link.threat_id).where(Link.instrument_id == instrument.id)
    dismissed_here = select(Dismissal.threat_id).where(Dismissal.instrument_id == instrument.id)
    rows = session.execute(
        select(Threat.code, Threat.title, Threat.condition, Instrument.slug)
        .where(
            Link.threat_id == Threat.id,
            Link.instrument_id == Instrument.id,
            Instrument.family == instrument.family,
            Instrument.id != instrument.id,
            Threat.id.not_in(linked_here),  # type: ignore[union-attr]
            Threat.id.not_in(dismissed_here),  # type: ignore[union-attr]
        )
        .order_by(Threat.code, Instrument.slug)
    )
    found: dict[str, tuple[str, str, list[str], list[int]]] = {}
    for code, title, condition, slug in rows:
        _, _, shown, count = found.setdefault(code, (title, condition, [], [0]))
        count[0] += 1
        if len(shown) < RAISED_ON_SHOWN:
            shown.append(slug)
    return [
        RaisedElsewhere(code=code, title=title, condition=cond, raised_on=tuple(shown), count=count[0])
        for code, (title, cond, shown, count) in found.items()
    ]
