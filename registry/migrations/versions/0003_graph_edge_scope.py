"""graph edge scope

Adds ``graphedge.instrument_id`` (NULL: the edge belongs to every instrument's graph of the program, as every
edge did before; an instrument's id: only that instrument's graph) and widens the uniqueness of an edge from
(program, source, target) to (program, instrument, source, target), so the same edge can be scoped to two
sibling instruments. Existing edges keep NULL, i.e. stay program-wide.

Revision ID: 0003
Revises: 0002
Create Date: 2026-12-02
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

_OLD_ENDS = {"program_id", "source", "target"}
# SQLite reports the 0001 constraint without a name; this convention names it inside the batch copy.
_NAMING = {"uq": "uq_%(table_name)s_%(column_0_name)s_%(column_1_name)s_%(column_2_name)s"}


def _old_constraint_name() -> str:
    found = [
        uc.get("name")
        for uc in sa.inspect(op.get_bind()).get_unique_constraints("graphedge")
        if set(uc["column_names"]) == _OLD_ENDS
    ]
    return found[0] if found and found[0] else "uq_graphedge_program_id_source_target"


def upgrade() -> None:
    name = _old_constraint_name()
    with op.batch_alter_table("graphedge", schema=None, naming_convention=_NAMING) as batch_op:
        batch_op.add_column(sa.Column("instrument_id", sa.Integer(), nullable=True))
        batch_op.drop_constraint(name, type_="unique")
        batch_op.create_index(batch_op.f("ix_graphedge_instrument_id"), ["instrument_id"], unique=False)
        batch_op.create_foreign_key(
            "fk_graphedge_instrument_id_instrument", "instrument", ["instrument_id"], ["id"]
        )
        batch_op.create_unique_constraint(
            "uq_graphedge_scope_ends", ["program_id", "instrument_id", "source", "target"]
        )


def downgrade() -> None:
    with op.batch_alter_table("graphedge", schema=None) as batch_op:
        batch_op.drop_constraint("uq_graphedge_scope_ends", type_="unique")
        batch_op.drop_constraint("fk_graphedge_instrument_id_instrument", type_="foreignkey")
        batch_op.drop_index(batch_op.f("ix_graphedge_instrument_id"))
        batch_op.drop_column("instrument_id")
        batch_op.create_unique_constraint(
            "uq_graphedge_program_id_source_target", ["program_id", "source", "target"]
        )
