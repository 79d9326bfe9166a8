"""primary run

Adds ``run.is_primary``: the run a team marks as the one its dossier headline and relevance verdict rest on (at
most one per instrument, kept so by ``registry.runs.mark_primary``). Existing runs are not primary, so dossiers
keep following the latest estimate until a team marks one.

Revision ID: 0004
Revises: 0002 (set to 0003 when the graph-scope migration is merged before this one)
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision = "0002"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("run", schema=None) as batch_op:
        batch_op.add_column(sa.Column("is_primary", sa.Boolean(), server_default=sa.false(), nullable=False))


def downgrade() -> None:
    with op.batch_alter_table("run", schema=None) as batch_op:
        batch_op.drop_column("is_primary")
