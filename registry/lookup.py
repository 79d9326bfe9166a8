"""Finding an entity of any kind by its human label (slug, code, handle or key)."""

from __future__ import annotations

from sqlalchemy import literal, select, union_all
from sqlalchemy.orm import Session

from ivdossier.errors import InvalidInputError, NotFoundError
from ivdossier.registry import records
from ivdossier.registry.models import ENTITY_CLASSES, Entity


def find_any(session: Session, label: str) -> Entity:
    """The one entity whose slug/code/handle/key is `label`; an error when none or several match."""
    # One query over every kind's label column (not one per kind), then the matching rows by primary key.
    per_kind = [
        select(literal(k).label("kind"), cls.id.label("id")).where(records._label_column(cls) == label)  # type: ignore[attr-defined]
        for k, cls in enumerate(ENTITY_CLASSES)
    ]
    found = sorted(session.connection().execute(union_all(*per_kind)).all())
    hits = [records.get_by_id(session, ENTITY_CLASSES[kind], ident) for kind, ident in found]
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
