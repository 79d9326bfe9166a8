"""built-in threat identity

Gives every built-in catalogue entry the identity derived from its code (``registry.threats.builtin_uuid``), the
same on every registry, so an export from any registry names built-in threats as any other does. The audit events
and comments that address an entry by its old identity follow it. Team entries keep theirs.

Revision ID: 0006
Revises: 0005
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

from ivdossier.registry.threats import builtin_uuid

revision = "0006"
down_revision: str | None = "0005"
branch_labels = None
depends_on = None


def upgrade() -> None:
    bind = op.get_bind()
    rows = bind.execute(sa.text("SELECT id, code, uuid FROM threat WHERE origin = 'builtin'")).fetchall()
    for ident, code, old in rows:
        new = builtin_uuid(code)
        if new == old:
            continue
        bind.execute(sa.text("UPDATE threat SET uuid = :new WHERE id = :id"), {"new": new, "id": ident})
        for table in ("audit_event", "comment"):
            bind.execute(
                sa.text(f"UPDATE {table} SET entity_uuid = :new WHERE entity_uuid = :old"),
                {"new": new, "old": old},
            )


def downgrade() -> None:
    """Derived identities are kept: they are valid UUIDs, and the old random ones are not recoverable."""
