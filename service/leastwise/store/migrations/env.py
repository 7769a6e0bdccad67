"""Alembic environment: runs on the connection handed over by :func:`leastwise.store.database.migrate`."""

from __future__ import annotations

from alembic import context

from leastwise.store.tables import metadata

connection = context.config.attributes["connection"]
context.configure(connection=connection, target_metadata=metadata, render_as_batch=True)
with context.begin_transaction():
    context.run_migrations()
