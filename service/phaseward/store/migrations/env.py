"""Alembic environment: always run with a connection handed over by ``store.db.migrate``."""

from __future__ import annotations

from alembic import context

from phaseward.store.models import Base

connection = context.config.attributes["connection"]
context.configure(
    connection=connection,
    target_metadata=Base.metadata,
    render_as_batch=connection.dialect.name == "sqlite",
)
with context.begin_transaction():
    context.run_migrations()
