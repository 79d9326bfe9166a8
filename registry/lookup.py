"""Finding an entity of any kind by its human label (slug, code, handle or key)."""

from __future__ import annotations

from sqlmodel import Session

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.registry import records
from ivdossier.registry.models import ENTITY_CLASSES, Entity


def find_any(session: Session, label: str) -> Entity:
    """The one entity whose slug/code/handle/key is `label`; an error when none or several match."""
    hits = [obj for cls in ENTITY_CLASSES if (obj := records.find(session, cls, label)) is not None]
    if not hits:
        raise NotFoundError(
            f"nothing in this registry is named {label!r}; check the spelling with a list command."
        )
    if len(hits) > 1:
        kinds = ", ".join(h.kind for h in hits)
        raise InvalidInputError(
            f"{label!r} names several entities ({kinds}); rename one of them to tell them apart."
        )
    return hits[0]
