"""Alembic environment for the registry.

`registry.storage.db.upgrade` passes an open connection; the `alembic` command line (for
developers generating migrations) connects to `sqlalchemy.url` of migrations/alembic.ini.
Batch mode lets migrations alter tables on SQLite; the naming convention on the metadata
gives every constraint a stable name for later migrations to refer to.
"""

from alembic import context
from sqlalchemy import create_engine

from registry.storage.models import Base


def run(connection) -> None:  # type: ignore[no-untyped-def]
    context.configure(connection=connection, target_metadata=Base.metadata, render_as_batch=True)
    with context.begin_transaction():
        context.run_migrations()


connection = context.config.attributes.get("connection")
if connection is not None:
    run(connection)
else:
    with create_engine(context.config.get_main_option("sqlalchemy.url")).connect() as own:
        run(own)
        own.commit()
