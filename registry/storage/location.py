"""Where the registry is and which schema its files define: what a command needs before it
opens a database, in the standard library alone (no SQLAlchemy, no Alembic), so that read-only
commands on an up-to-date SQLite registry start quickly (`registry.storage.reads`).
"""

from __future__ import annotations

import os
import re
from importlib import resources
from pathlib import Path

from registry.errors import InputError

DEFAULT_PATH = "priorledger.db"
# The largest id SQLite and PostgreSQL's bigint can hold (a signed 64-bit integer).
MAX_ID = 2**63 - 1


def resolve_url(db: str | None = None) -> str:
    """The SQLAlchemy URL for `db`, `PRIORLEDGER_DB` or the default file."""
    target = db or os.environ.get("PRIORLEDGER_DB") or DEFAULT_PATH
    if "://" in target:
        return target
    path = Path(target).expanduser()
    if path.is_dir():
        raise InputError(f"{path} is a folder; give a registry file or URL", field="--db")
    if not path.parent.is_dir():
        raise InputError(f"folder {path.parent} does not exist", field="--db")
    if path.is_file() and path.stat().st_size == 0:
        # SQLite would take an empty file for a new database and migrate it: a registry
        # truncated to nothing would come back empty instead of being noticed. (A registry
        # being created is never seen empty: `db.ensure_schema` links it in once migrated.)
        raise InputError(f"{path} is an empty file, not a registry", field="--db")
    return f"sqlite:///{path.resolve()}"


def check_id(value: int, field: str) -> int:
    """An id as given by a user, refused when no database integer can hold it."""
    if not -MAX_ID <= value <= MAX_ID:
        raise InputError(f"{value} is too large for an id", field=field)
    return value


def sqlite_name(error: BaseException) -> str:
    return getattr(error, "sqlite_errorname", "") or ""


# SQLite errors that say the file cannot serve as a registry (not a race, not a bug).
SQLITE_ENVIRONMENT = (
    "SQLITE_NOTADB", "SQLITE_CORRUPT", "SQLITE_CANTOPEN", "SQLITE_READONLY", "SQLITE_FULL",
    "SQLITE_IOERR", "SQLITE_PERM", "SQLITE_AUTH",
)  # fmt: skip
# `revision = "0005"` and `down_revision = "0004"` lines of a migration file.
_REVISION_LINE = re.compile(r'^(revision|down_revision)\s*=\s*"([^"]+)"', re.MULTILINE)


def head_from_files() -> str | None:
    """The one revision no migration revises, read from the migration files as text, so that
    a registry already up to date is opened without importing Alembic (about a quarter of a
    second); None where the files do not make one linear chain (Alembic then decides)."""
    revisions, revised = set(), set()
    for path in resources.files("registry.migrations").joinpath("versions").iterdir():
        if not path.name.endswith(".py") or path.name.startswith("_"):
            continue
        found = dict(_REVISION_LINE.findall(path.read_text()))
        if "revision" not in found:
            return None
        revisions.add(found["revision"])
        if "down_revision" in found:
            revised.add(found["down_revision"])
    heads = revisions - revised
    return heads.pop() if len(heads) == 1 else None
