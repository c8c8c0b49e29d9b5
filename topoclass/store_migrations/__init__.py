"""Schema migrations of the results store (Alembic scripts, shipped as package data).

:func:`topoclass.store.open_store` runs them, so a store written by an older topoclass is
brought up to date when a newer one opens it. Add a change as a new file in ``versions/`` whose
``down_revision`` is the newest one; never edit a released revision.
"""
