"""threat kind and retired codes

Adds ``threat.threat_kind`` ("condition" for threats to the four conditions, "reading" for threats to what the
estimate means, its uncertainty or how the specification was chosen) and ``threat.retired_into`` (the successor
of a built-in code that was merged or replaced). Existing rows all attack one of the four conditions, so the
server default "condition" is right for them; the catalogue sync fills both columns for built-in entries.

Revision ID: 0002
Revises: 0001
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("threat", schema=None) as batch_op:
        batch_op.add_column(
            sa.Column("threat_kind", sa.String(length=12), server_default="condition", nullable=False)
        )
        batch_op.add_column(
            sa.Column("retired_into", sa.String(length=32), server_default="", nullable=False)
        )


def downgrade() -> None:
    with op.batch_alter_table("threat", schema=None) as batch_op:
        batch_op.drop_column("retired_into")
        batch_op.drop_column("threat_kind")
