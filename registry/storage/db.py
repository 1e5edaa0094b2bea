"""Where the registry lives, and bringing its schema up to date with Alembic.

The location is `--db URL_OR_PATH`, else `PRIORLEDGER_DB`, else `./priorledger.db`; a bare
path is a SQLite file. Migrations are applied by `priorledger init` and on first use of an
empty registry; a registry whose schema is older than this version is upgraded the same way.
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterator
from contextlib import contextmanager
from importlib import resources
from pathlib import Path

from sqlalchemy import Engine, create_engine, event, inspect, text
from sqlalchemy.orm import Session, sessionmaker

from registry.errors import InputError

DEFAULT_PATH = "priorledger.db"


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
    return f"sqlite:///{path.resolve()}"


def who(user: str | None = None) -> str | None:
    """The user a write is recorded under: `user`, else `PRIORLEDGER_USER`, else the operating
    system's login name (None when the system cannot say, as in some containers)."""
    import getpass

    given = (user or os.environ.get("PRIORLEDGER_USER") or "").strip()
    if given:
        return given
    try:
        return getpass.getuser() or None
    except (OSError, KeyError):  # no login name and no user database entry
        return None


def _sqlite_pragmas(dbapi_connection, _record) -> None:  # type: ignore[no-untyped-def]
    cursor = dbapi_connection.cursor()
    cursor.execute("PRAGMA foreign_keys = ON")
    cursor.close()


def make_engine(url: str) -> Engine:
    engine = create_engine(url)
    if engine.dialect.name == "sqlite":
        event.listen(engine, "connect", _sqlite_pragmas)
    return engine


def _alembic_config():  # type: ignore[no-untyped-def]
    from alembic.config import Config

    config = Config()
    config.set_main_option("script_location", str(resources.files("registry.migrations")))
    return config


# `revision = "0005"` and `down_revision = "0002"` lines of a migration file.
_REVISION_LINE = re.compile(r'^(revision|down_revision)\s*=\s*"([^"]+)"', re.MULTILINE)


def _head_from_files() -> str | None:
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


def head_revision() -> str:
    head = _head_from_files()
    if head is not None:
        return head
    from alembic.script import ScriptDirectory

    head = ScriptDirectory.from_config(_alembic_config()).get_current_head()
    assert head is not None  # the package always ships at least one migration
    return head


def current_revision(engine: Engine) -> str | None:
    """The registry's schema revision, read from Alembic's version table with plain SQL."""
    with engine.connect() as connection:
        if not inspect(connection).has_table("alembic_version"):
            return None
        rows = connection.execute(text("SELECT version_num FROM alembic_version")).scalars()
        versions = list(rows)
    return versions[0] if len(versions) == 1 else None


def upgrade(engine: Engine) -> None:
    """Apply every migration not yet applied, in one transaction."""
    from alembic import command

    config = _alembic_config()
    with engine.begin() as connection:
        config.attributes["connection"] = connection
        command.upgrade(config, "head")


def ensure_schema(engine: Engine) -> None:
    """Migrate an empty or older registry; a registry newer than this version is refused."""
    current = current_revision(engine)
    if current == head_revision():
        return
    if current is None and inspect(engine).get_table_names():
        raise InputError(
            "the database has tables but is not a priorledger registry; give another --db",
            field="--db",
        )
    upgrade(engine)


@contextmanager
def transaction(factory: sessionmaker[Session], *, commit: bool = True) -> Iterator[Session]:
    """A session whose work is committed together or not at all (never, with commit=False)."""
    with factory() as session:
        outer = session.begin()
        try:
            yield session
        except BaseException:
            outer.rollback()
            raise
        if commit:
            outer.commit()
        else:
            outer.rollback()
