"""Keep the registry's copy of the built-in threat catalogue current (team entries are never touched).

A registry picks up a new catalogue the first time it is opened by a newer ``ivdossier``: new entries are
added, changed ones refreshed, and links to merged or replaced codes carried to their successors, each step an
audit event. The check that decides whether anything is due is one small query, so opening stays cheap.
"""

from __future__ import annotations

from typing import Any

from sqlalchemy import case, func, select
from sqlalchemy.orm import Session

from ivdossier.registry.db import Registry
from ivdossier.registry.models import Threat

#: Who the audit trail names for catalogue refreshes and carry-overs made when a registry is opened: the tool,
#: not the person whose command happened to open the registry first.
CATALOG_ACTOR = "ivdossier-catalogue"


def catalog_is_current(session: Session) -> bool:
    """True when every built-in row carries the shipped catalogue version (and there is at least one)."""
    from ivdossier.threats_catalog.version import CATALOGUE_VERSION

    stale = case((Threat.catalog_version != CATALOGUE_VERSION, 1), else_=0)
    query = select(func.count(), func.coalesce(func.sum(stale), 0)).where(Threat.origin == "builtin")
    # one query: this runs whenever a command opens the registry
    total, outdated = session.execute(query).one()
    return bool(total) and not outdated


def ensure_builtin(session: Session, *, actor: str) -> int:
    """Add, refresh or retire built-in entries when the registry's copy is older than the shipped catalogue."""
    from ivdossier.registry.db import serialize_writes
    from ivdossier.registry.threats import sync_catalog
    from ivdossier.threats_catalog import load_builtin
    from ivdossier.threats_catalog.catalog import RETIRED

    serialize_writes(session, "catalogue")  # simultaneous first opens on PostgreSQL: one loads, the rest wait
    if catalog_is_current(session):
        return 0
    catalog = load_builtin()
    return sync_catalog(
        session, (t.to_dict() for t in catalog), version=catalog.version, actor=actor, retired=RETIRED
    )


def sync_on_open(registry: Registry, *, actor: str = CATALOG_ACTOR) -> int:
    """Bring an opened registry's catalogue up to date in its own short transaction (nothing when current)."""
    with registry.reading() as session:
        if catalog_is_current(session):
            return 0
    with registry.writing() as session:
        return ensure_builtin(session, actor=actor)


def catalog_entry(row: Threat) -> Any:
    """The registry's copy of a threat as a validated catalogue entry (with its graph fragment)."""
    from ivdossier.registry.threats import THREAT_FIELDS
    from ivdossier.threats_catalog.catalog import Threat as CatalogThreat

    data = {f: getattr(row, f) for f in THREAT_FIELDS}
    data["code"] = row.code
    for f in ("families", "checks", "mitigations", "references"):
        data[f] = data[f] or []
    data["fragment"] = data["fragment"] or {"nodes": [], "edges": []}
    return CatalogThreat.from_dict(data, source=f"registry threat {row.code}")


def registry_catalog(session: Session) -> Any:
    """The catalogue as this registry sees it: built-in entries followed by the team's own."""
    from ivdossier.threats_catalog.catalog import load_builtin, merge

    team = [
        catalog_entry(t)
        for t in session.scalars(select(Threat).where(Threat.origin == "team").order_by(Threat.code))
    ]
    return merge(load_builtin(), team)
