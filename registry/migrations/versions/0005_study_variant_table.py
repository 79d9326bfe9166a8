"""study variant table

Adds ``study.variant_table``: a published study's per-variant summary table (file name, SHA-256, columns and the
rows as read), attached so that the literature audit re-analyses it (IVW, MR-Egger, weighted median, Q) beside
the estimate the study reported. Existing studies have none.

Revision ID: 0005
Revises: 0004
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0005"
down_revision: str | None = "0004"
branch_labels = None
depends_on = None


def upgrade() -> None:
    with op.batch_alter_table("study", schema=None) as batch_op:
        batch_op.add_column(sa.Column("variant_table", sa.JSON(), nullable=True))


def downgrade() -> None:
    with op.batch_alter_table("study", schema=None) as batch_op:
        batch_op.drop_column("variant_table")
