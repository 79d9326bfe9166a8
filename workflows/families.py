"""Instrument families: the catalogue's list, validation of a typed family, and entry counts per family."""

from __future__ import annotations

import difflib
from typing import Any

from sqlalchemy.orm import Session

from ivdossier.errors import InvalidInputError
from ivdossier.threats_catalog.catalog import FAMILIES

#: "any" marks catalogue entries that apply to every family; an instrument belongs to one real family.
GENERIC = "any"
INSTRUMENT_FAMILIES: tuple[str, ...] = tuple(f for f in FAMILIES if f != GENERIC)


def check_family(value: str, *, option: str = "--family", allow_generic: bool = False) -> str:
    """The family in its catalogue spelling (any letter case is accepted), or an InvalidInputError listing them."""
    allowed = FAMILIES if allow_generic else INSTRUMENT_FAMILIES
    wanted = value.strip().lower()
    if wanted in allowed:
        return wanted
    near = difflib.get_close_matches(wanted, allowed, n=1, cutoff=0.5)
    hint = f" Did you mean {near[0]!r}?" if near else ""
    raise InvalidInputError(
        f"{option} {value!r} is not a family of the threat catalogue.{hint} Use one of: {', '.join(allowed)} "
        "(`ivdossier family list` shows them with their entries)."
    )


def family_rows(session: Session) -> list[dict[str, Any]]:
    """One row per family: its code prefix, how many catalogue entries name it, and how many instruments use it."""
    from sqlalchemy import select

    from ivdossier.registry.models import Instrument
    from ivdossier.threats_catalog.catalog import FAMILY_PREFIXES
    from ivdossier.workflows.catalog_sync import registry_catalog

    catalog = registry_catalog(session)
    entries = {f: 0 for f in FAMILIES}
    for threat in catalog:
        for fam in threat.families:
            entries[fam] = entries.get(fam, 0) + 1
    used: dict[str, int] = {}
    for fam in session.scalars(select(Instrument.family)):
        used[fam] = used.get(fam, 0) + 1
    generic = entries.get(GENERIC, 0)
    return [
        {
            "family": fam,
            "prefix": FAMILY_PREFIXES.get(fam, ""),
            "entries": entries.get(fam, 0),
            "suggested": entries.get(fam, 0) + (generic if fam != GENERIC else 0),
            "instruments": used.get(fam, 0),
        }
        for fam in FAMILIES
    ]
