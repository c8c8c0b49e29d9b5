"""Alembic environment: runs on the connection :func:`topoclass.store.open_store` hands over.

That connection already holds the store's write lock and an open transaction, so two processes
opening a new store at once cannot both create its tables.
"""

from alembic import context

connection = context.config.attributes["connection"]
context.configure(connection=connection, target_metadata=None, render_as_batch=True,
                  version_table=context.config.attributes["version_table"])
with context.begin_transaction():
    context.run_migrations()
