"""Alembic environment. Run through :mod:`keystrata.storage.migrate`, which passes an
open connection in ``config.attributes["connection"]``."""

from __future__ import annotations

from alembic import context

from keystrata.storage.models import Base

config = context.config
connection = config.attributes.get("connection")
if connection is None:
    raise RuntimeError("run migrations with `keystrata db upgrade`, not the alembic command")

context.configure(
    connection=connection,
    target_metadata=Base.metadata,
    render_as_batch=connection.dialect.name == "sqlite",
    compare_type=True,
)
with context.begin_transaction():
    context.run_migrations()
