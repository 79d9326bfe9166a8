"""Domain rules for imported entities: an import passes the same checks as the commands that create them.

The registry layer validates types, names and references of an export; the catalogue's rules for threats
(known checks, a well-formed acyclic graph fragment, allowed conditions, mechanisms and families) live in
`threats_catalog`, which the registry may not import, so they are applied here and passed in.
"""

from __future__ import annotations

from collections.abc import Sequence
from typing import Any

from sqlalchemy.orm import Session

from ivdossier.errors import IvdossierError
from ivdossier.registry import records
from ivdossier.registry.portability import ExportContent, ImportReport, Incoming, import_registry
from ivdossier.registry.threats import THREAT_FIELDS

LIST_FIELDS = ("families", "checks", "mitigations", "references")


def _threat_problems(e: Incoming) -> list[str]:
    from ivdossier.threats_catalog.catalog import TEAM_PREFIX
    from ivdossier.threats_catalog.catalog import Threat as CatalogThreat

    data: dict[str, Any] = {f: e.values.get(f) for f in THREAT_FIELDS}
    data["code"] = e.values.get("code")
    for f in LIST_FIELDS:
        data[f] = data[f] or []
    data["fragment"] = data["fragment"] or {"nodes": [], "edges": []}
    out: list[str] = []
    try:
        CatalogThreat.from_dict(data, source=e.rel)
    except IvdossierError as exc:
        out.append(str(exc).rstrip("."))
    origin, code = e.values.get("origin"), str(e.values.get("code"))
    if origin not in ("builtin", "team"):
        out.append(f"{e.rel} field origin {str(origin)[:20]!r} is not one of builtin, team")
    elif (origin == "team") != code.startswith(TEAM_PREFIX):
        out.append(
            f"{e.rel}: code {code[:40]!r} does not match origin {origin!r} (team codes start with {TEAM_PREFIX})"
        )
    return out


def _named(e: Incoming, field: str, what: str) -> list[str]:
    value = e.values.get(field)
    return (
        [] if isinstance(value, str) and value.strip() else [f"{e.rel} field {field}: {what} needs a {field}"]
    )


def domain_problems(entities: Sequence[Incoming]) -> list[str]:
    """Problems with entities about to be written, by the rules of the commands that create them."""
    out: list[str] = []
    for e in entities:
        if e.kind == "threat":
            out += _threat_problems(e)
        elif e.kind == "program":
            out += _named(e, "title", "a program")
        elif e.kind == "instrument":
            out += _named(e, "name", "an instrument")
            family = e.values.get("family")
            if family:
                try:
                    records.check_slug(str(family), what="family")
                except IvdossierError as exc:
                    out.append(f"{e.rel}: {str(exc).rstrip('.')}")
    return out


def import_checked(
    session: Session, content: ExportContent, *, actor: str, on_conflict: str = "stop", dry_run: bool = False
) -> ImportReport:
    """`import_registry` with the domain rules applied to every entity it would add or replace."""
    return import_registry(
        session, content, actor=actor, on_conflict=on_conflict, dry_run=dry_run, check_domain=domain_problems
    )
