"""Alembic environment: runs on the connection aftercast hands over (never from an ini file)."""

from alembic import context

from aftercast.store.schema import metadata

connection = context.config.attributes["connection"]
context.configure(connection=connection, target_metadata=metadata, render_as_batch=True)
with context.begin_transaction():
    context.run_migrations()
