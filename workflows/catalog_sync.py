"""Keep the registry's copy of the built-in threat catalogue current (team entries are never touched)."""

from __future__ import annotations

from sqlmodel import Session, func, select

from ivdossier.registry.models import Threat
from ivdossier.registry.threats import sync_catalog


def ensure_builtin(session: Session, *, actor: str) -> int:
    """Add or refresh built-in entries when the registry's copy is older than the shipped catalogue."""
    from ivdossier.threats_catalog import load_builtin

    catalog = load_builtin()
    current = session.exec(
        select(func.count()).where(Threat.origin == "builtin", Threat.catalog_version == catalog.version)
    ).one()
    if current == len(catalog):
        return 0
    return sync_catalog(session, (t.to_dict() for t in catalog), version=catalog.version, actor=actor)
