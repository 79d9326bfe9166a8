"""Catalogue threats in the registry, their links to instruments, reviewers' ratings and family propagation."""

from __future__ import annotations

import statistics
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from sqlmodel import Session, select

from ivdossier.errors import InvalidInputError
from ivdossier.registry import records
from ivdossier.registry.models import (
    CONDITIONS,
    LINK_STATES,
    Dismissal,
    Instrument,
    Link,
    Member,
    Rating,
    Threat,
)

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


def sync_catalog(session: Session, entries: Iterable[Mapping[str, Any]], *, version: str, actor: str) -> int:
    """Add built-in entries the registry lacks and refresh older built-ins; team entries are never touched.

    Returns the number of entries added or refreshed.
    """
    existing = {t.code: t for t in session.exec(select(Threat))}
    changed = 0
    for entry in entries:
        code = str(entry["code"])
        values = {f: entry.get(f) for f in THREAT_FIELDS}
        current = existing.get(code)
        if current is None:
            threat = Threat(code=code, origin="builtin", catalog_version=version, **values)
            records.create(session, threat, actor=actor, reason=f"built-in catalogue {version}")
            changed += 1
        elif current.origin == "builtin" and current.catalog_version != version:
            records.edit(
                session,
                current,
                {**values, "catalog_version": version},
                actor=actor,
                action="catalog-upgrade",
                reason=f"built-in catalogue {current.catalog_version} -> {version}",
            )
            changed += 1
    return changed


def add_team_threat(session: Session, *, actor: str, entry: Mapping[str, Any]) -> Threat:
    """Store a team-written catalogue entry (its code must not collide with a built-in one)."""
    code = str(entry.get("code", ""))
    if not code.startswith("T-"):
        raise InvalidInputError(
            f"team threat codes start with 'T-' (got {code!r}); built-in codes are reserved."
        )
    condition = str(entry.get("condition", ""))
    if condition not in CONDITIONS:
        raise InvalidInputError(f"unknown condition {condition!r}; use one of: {', '.join(CONDITIONS)}.")
    values = {f: entry.get(f) for f in THREAT_FIELDS if entry.get(f) is not None}
    return records.create(session, Threat(code=code, origin="team", **values), actor=actor)


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
    threat = records.get(session, Threat, code)
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
    obj = records.get(session, Link, link)
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
    rows = session.exec(
        select(Link, Threat)
        .where(Link.instrument_id == instrument.id, Link.threat_id == Threat.id)
        .order_by(Threat.code)
    )
    return [(link, threat) for link, threat in rows]


def rate_link(
    session: Session, *, actor: str, link: str, likelihood: int, severity: int, comment: str = ""
) -> Rating:
    """Record (or replace) the acting member's likelihood and severity for a link."""
    obj = records.get(session, Link, link)
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
    existing = session.exec(
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
    out = []
    for link, threat in links_of(session, instrument):
        rows = session.exec(
            select(Rating, Member)
            .where(Rating.link_id == link.id, Rating.member_id == Member.id)
            .order_by(Member.handle)
        ).all()
        ratings = tuple((m.handle, r.likelihood, r.severity, r.comment) for r, m in rows)
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
    return list(session.exec(query))


def dismiss(session: Session, *, actor: str, instrument: str, code: str, reason: str) -> Dismissal:
    """Record that a threat raised on a sibling instrument does not apply to this one."""
    inst = records.get(session, Instrument, instrument)
    threat = records.get(session, Threat, code)
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
    rows = session.exec(
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
