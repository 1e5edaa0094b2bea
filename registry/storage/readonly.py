"""Opening a registry to read it: the commands that only read (entries, sources, priors,
prior, trace, diff, emit) should cost little more than starting the command, and importing
SQLAlchemy costs more than the rest of the start-up together. So an up-to-date SQLite
registry is read with the standard library's `sqlite3`; any other (missing, an older schema,
PostgreSQL, or not a registry at all) is opened as a `Ledger`, which migrates it or says what
is wrong, and read through the same queries (`registry.storage.reads`).
"""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from registry.errors import InputError
from registry.storage import location
from registry.storage.reads import Reads


def _sqlite_file(url: str) -> Path | None:
    """The file of a `sqlite:///PATH` URL that exists, else None."""
    prefix = "sqlite:///"
    if not url.startswith(prefix):
        return None
    path = Path(url.removeprefix(prefix))
    return path.resolve() if path.is_file() else None


@contextmanager
def _sqlite_reads(path: Path) -> Iterator[Reads | None]:
    """Reads straight from an up-to-date SQLite registry in one read transaction; None when
    the file is not one (then the caller opens it as a `Ledger`, which says why)."""
    try:
        # a URI, so the file opens read only; as_uri escapes what a name may hold (?, #, %)
        connection = sqlite3.connect(f"{path.as_uri()}?mode=ro", uri=True, timeout=30.0)
    except sqlite3.Error:
        yield None
        return
    try:
        connection.row_factory = sqlite3.Row
        connection.isolation_level = None  # this module, not the driver, begins
        try:
            connection.execute("BEGIN")
            version = connection.execute("SELECT version_num FROM alembic_version").fetchall()
        except sqlite3.Error:
            version = []
        if [tuple(v) for v in version] != [(location.head_from_files(),)]:
            yield None
            return

        def run(sql: str, params: Mapping[str, Any]) -> Sequence[Mapping[str, Any]]:
            try:
                return connection.execute(sql, params).fetchall()
            except sqlite3.Error as error:
                if location.sqlite_name(error).startswith(location.SQLITE_ENVIRONMENT):
                    raise InputError(f"registry {path}: {error}", field="--db") from None
                raise

        yield Reads(run)
    finally:
        connection.close()


@contextmanager
def reading(db: str | None = None) -> Iterator[Reads]:
    """Reads of the registry at `db` (as `--db` takes it), in one read transaction."""
    path = _sqlite_file(location.resolve_url(db))
    if path is not None:
        with _sqlite_reads(path) as reads:
            if reads is not None:
                yield reads
                return
    from registry.storage.ledger import Ledger

    with Ledger.open(db).reading() as reads:
        yield reads
