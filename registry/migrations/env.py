"""alembic environment: migrations run on the engine the registry passes in."""

from __future__ import annotations

from alembic import context

from ivdossier.registry.models import Base, postgresql_options

postgresql_options()  # the metadata alembic compares carries every database's options

config = context.config
engine = config.attributes["engine"]
target_metadata = Base.metadata

with engine.begin() as connection:
    context.configure(
        connection=connection,
        target_metadata=target_metadata,
        render_as_batch=connection.dialect.name == "sqlite",
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()
