"""Alembic environment for the registry. Run by `registry.storage.db.upgrade`.

Batch mode lets migrations alter tables on SQLite; the naming convention on the metadata
gives every constraint a stable name for later migrations to refer to.
"""

from alembic import context

from registry.storage.models import Base

connection = context.config.attributes.get("connection")
if connection is None:
    raise RuntimeError("run migrations through `priorledger init`, which passes a connection")

context.configure(
    connection=connection,
    target_metadata=Base.metadata,
    render_as_batch=True,
)
with context.begin_transaction():
    context.run_migrations()
