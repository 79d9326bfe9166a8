"""Comments: remarks a team member leaves on any entity, addressed by the entity's UUID and audited like any write."""

from __future__ import annotations

import uuid as uuid_mod
from dataclasses import dataclass
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from ivdossier.errors import InvalidInputError
from ivdossier.registry import records
from ivdossier.registry.lookup import find_any
from ivdossier.registry.models import Comment, Entity

MAX_COMMENT = 20_000


@dataclass(frozen=True)
class CommentView:
    """One comment as shown to a reader: who wrote what, when, on which entity."""

    slug: str
    entity_kind: str
    entity: str
    author: str
    at: str
    body: str
    version: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "slug": self.slug,
            "entity_kind": self.entity_kind,
            "entity": self.entity,
            "author": self.author,
            "at": self.at,
            "body": self.body,
            "version": self.version,
        }


def add_comment(session: Session, *, actor: str, target: str, body: str) -> Comment:
    """Attach a comment by `actor` to the entity whose slug (or code, handle, key) is `target`."""
    entity = find_any(session, target)
    if isinstance(entity, Comment):
        raise InvalidInputError(
            f"{target!r} is itself a comment; comment on the entity it is about ({entity.entity_kind})."
        )
    if not body.strip():
        raise InvalidInputError("a comment needs text; pass the text as the second argument or @FILE.")
    records.check_text(body, field="comment", max_length=MAX_COMMENT)
    comment = Comment(
        slug=f"comment-{uuid_mod.uuid4().hex[:12]}",
        entity_kind=entity.kind,
        entity_uuid=entity.uuid,
        author=actor,
        body=body,
    )
    return records.create(session, comment, actor=actor)


def comments_on(session: Session, entity: Entity) -> list[Comment]:
    """Comments about one entity, oldest first."""
    query = (
        select(Comment).where(Comment.entity_uuid == entity.uuid).order_by(Comment.created_at, Comment.id)  # type: ignore[arg-type]
    )
    return list(session.scalars(query))


def comment_views(session: Session, target: str) -> list[CommentView]:
    """The comments on the entity named `target`, ready to print or turn into JSON."""
    entity = find_any(session, target)
    return [
        CommentView(
            slug=c.slug,
            entity_kind=entity.kind,
            entity=entity.label,
            author=c.author,
            at=c.created_at.isoformat(),
            body=c.body,
            version=c.version,
        )
        for c in comments_on(session, entity)
    ]
