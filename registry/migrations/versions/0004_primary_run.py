"""primary run

Adds ``run.is_primary``: the run a team marks as the one its dossier headline and relevance verdict rest on (at
most one per instrument: ``registry.runs.mark_primary`` unmarks the previous one, and a partial unique index keeps
concurrent writers from leaving two). Existing runs are not primary, so dossiers
keep following the latest estimate until a team marks one.

Revision ID: 0004
Revises: 0002 (set to 0003 when the graph-scope migration is merged before this one)
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0004"
down_revision: str | None = "0003"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("run", schema=None) as batch_op:
        batch_op.add_column(sa.Column("is_primary", sa.Boolean(), server_default=sa.false(), nullable=False))
    op.create_index(
        "ux_run_one_primary_per_instrument",
        "run",
        ["instrument_id"],
        unique=True,
        sqlite_where=sa.text("is_primary"),
        postgresql_where=sa.text("is_primary"),
    )


def downgrade() -> None:
    op.drop_index("ux_run_one_primary_per_instrument", table_name="run")
    with op.batch_alter_table("run", schema=None) as batch_op:
        batch_op.drop_column("is_primary")
