"""SQLAlchemy 2 models of the registry.

Who wrote a record is `created_by` (and `retracted_by`): the user named on the command line,
else `PRIORLEDGER_USER`, else the login name (`registry.storage.db.who`); null on records
written before the registry recorded users.

History is append-only: an entry's numbers live in `entry_revisions`, one row per revision,
never updated; the current state of an entry is its highest revision. A source is never
deleted; a retraction is recorded on it with its reason and time.
"""

from __future__ import annotations

from datetime import UTC, datetime

from sqlalchemy import (
    JSON,
    Boolean,
    DateTime,
    Float,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    String,
    Text,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

# A fixed naming convention lets later migrations alter constraints on SQLite (batch mode).
NAMING = {
    "ix": "ix_%(column_0_label)s",
    "uq": "uq_%(table_name)s_%(column_0_name)s",
    "ck": "ck_%(table_name)s_%(constraint_name)s",
    "fk": "fk_%(table_name)s_%(column_0_name)s_%(referred_table_name)s",
    "pk": "pk_%(table_name)s",
}


def utcnow() -> datetime:
    return datetime.now(UTC)


class Base(DeclarativeBase):
    metadata = MetaData(naming_convention=NAMING)


class Source(Base):
    """A publication (or an expert's elicitation record) that entries are extracted from."""

    __tablename__ = "sources"

    id: Mapped[int] = mapped_column(primary_key=True)
    key: Mapped[str] = mapped_column(String(200), unique=True)
    citation: Mapped[str | None] = mapped_column(Text)
    title: Mapped[str | None] = mapped_column(Text)
    authors: Mapped[str | None] = mapped_column(Text)
    journal: Mapped[str | None] = mapped_column(Text)
    doi: Mapped[str | None] = mapped_column(String(300))
    year: Mapped[int | None] = mapped_column(Integer)
    retracted: Mapped[bool] = mapped_column(Boolean, default=False)
    retraction_reason: Mapped[str | None] = mapped_column(Text)
    retracted_at: Mapped[datetime | None] = mapped_column(DateTime(timezone=True))
    retracted_by: Mapped[str | None] = mapped_column(String(200))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    created_by: Mapped[str | None] = mapped_column(String(200))


class SourceRevision(Base):
    """One version of a source's metadata, kept when the source is edited or updated."""

    __tablename__ = "source_revisions"
    __table_args__ = (UniqueConstraint("source_id", "revision"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    source_id: Mapped[int] = mapped_column(ForeignKey("sources.id"))
    revision: Mapped[int] = mapped_column(Integer)
    fields: Mapped[dict[str, object]] = mapped_column(JSON)
    reason: Mapped[str] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    created_by: Mapped[str | None] = mapped_column(String(200))


class Study(Base):
    """One study, which several sources may report; a prior must not count it twice."""

    __tablename__ = "studies"

    id: Mapped[int] = mapped_column(primary_key=True)
    key: Mapped[str] = mapped_column(String(200), unique=True)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=utcnow)


class ImportRecord(Base):
    """One import of a sheet or bibliography, kept so a reviewer can see where rows came from."""

    __tablename__ = "imports"

    id: Mapped[int] = mapped_column(primary_key=True)
    kind: Mapped[str] = mapped_column(String(20))
    path: Mapped[str] = mapped_column(Text)
    sha256: Mapped[str] = mapped_column(String(64))
    added: Mapped[int] = mapped_column(Integer)
    skipped: Mapped[int] = mapped_column(Integer)
    imported_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    created_by: Mapped[str | None] = mapped_column(String(200))


class Entry(Base):
    """The identity of one reported estimate; its content is in its revisions."""

    __tablename__ = "entries"

    id: Mapped[int] = mapped_column(primary_key=True)
    # Hash of the sheet row as first imported (its cells before migration 0004, its identity
    # since); imports look rows up by the revisions' `identity`.
    fingerprint: Mapped[str] = mapped_column(String(64), unique=True)
    # A curator's stable key for the sheet row: the row imported again revises this entry.
    # (A unique index, not a constraint: SQLite can add one to an existing table.)
    row_key: Mapped[str | None] = mapped_column(String(200), index=True, unique=True)
    import_id: Mapped[int | None] = mapped_column(ForeignKey("imports.id"))
    row: Mapped[int | None] = mapped_column(Integer)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=utcnow)

    revisions: Mapped[list[EntryRevision]] = relationship(
        back_populates="entry", order_by="EntryRevision.revision"
    )
    origin: Mapped[ImportRecord | None] = relationship()


class EntryRevision(Base):
    """One immutable version of an entry: the numbers as reported and what was derived."""

    __tablename__ = "entry_revisions"
    __table_args__ = (
        UniqueConstraint("entry_id", "revision"),
        # Listings of a large registry (migration 0005): a quantity's entries in id order,
        # and a source's entry count, each read from an index alone.
        Index("ix_entry_revisions_quantity_entry", "quantity", "entry_id", "revision"),
        Index("ix_entry_revisions_source_entry", "source_id", "entry_id"),
    )

    id: Mapped[int] = mapped_column(primary_key=True)
    entry_id: Mapped[int] = mapped_column(ForeignKey("entries.id"))
    revision: Mapped[int] = mapped_column(Integer)
    source_id: Mapped[int] = mapped_column(ForeignKey("sources.id"))
    study_id: Mapped[int] = mapped_column(ForeignKey("studies.id"))
    quantity: Mapped[str] = mapped_column(String(200), index=True)
    measure: Mapped[str] = mapped_column(String(40), index=True)
    # The reported numbers exactly as entered (text), keyed by column name.
    reported: Mapped[dict[str, str]] = mapped_column(JSON)
    y: Mapped[float] = mapped_column(Float)
    se: Mapped[float] = mapped_column(Float)
    scale: Mapped[str] = mapped_column(String(20))
    conversion: Mapped[str] = mapped_column(String(80))
    # Canonical numbers with source, study, quantity and measure (`sheets.identity`). Set on
    # every revision; nullable only because SQLite adds no NOT NULL column to a table that
    # others refer to (migration 0004).
    identity: Mapped[str | None] = mapped_column(String(64), index=True)
    corrections: Mapped[list[str]] = mapped_column(JSON, default=list)
    # Context and provenance columns of the extraction sheet, and any x_ columns.
    context: Mapped[dict[str, str]] = mapped_column(JSON, default=dict)
    extra: Mapped[dict[str, str]] = mapped_column(JSON, default=dict)
    reason: Mapped[str] = mapped_column(Text)
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    created_by: Mapped[str | None] = mapped_column(String(200))

    entry: Mapped[Entry] = relationship(back_populates="revisions")
    source: Mapped[Source] = relationship()
    study: Mapped[Study] = relationship()
    tags: Mapped[list[EntryTag]] = relationship(order_by="EntryTag.tag")


class EntryTag(Base):
    __tablename__ = "entry_tags"
    __table_args__ = (
        Index("ix_entry_tags_tag", "tag"),
        Index("ix_entry_tags_tag_revision", "tag", "revision_id"),  # migration 0005
    )

    revision_id: Mapped[int] = mapped_column(ForeignKey("entry_revisions.id"), primary_key=True)
    tag: Mapped[str] = mapped_column(String(100), primary_key=True)


class PriorVersion(Base):
    """One immutable built prior `name@version`: its definition, result and digest."""

    __tablename__ = "prior_versions"
    __table_args__ = (UniqueConstraint("name", "version"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(200), index=True)
    version: Mapped[int] = mapped_column(Integer)
    digest: Mapped[str] = mapped_column(String(64))
    # The definition in canonical form, and everything the build computed from it.
    definition: Mapped[dict] = mapped_column(JSON)
    result: Mapped[dict] = mapped_column(JSON)
    software_version: Mapped[str] = mapped_column(String(40))
    created_at: Mapped[datetime] = mapped_column(DateTime(timezone=True), default=utcnow)
    created_by: Mapped[str | None] = mapped_column(String(200))

    uses: Mapped[list[PriorEntry]] = relationship(order_by="PriorEntry.position")


class PriorEntry(Base):
    """An exact entry revision a prior was built from, its ratings, discount and share."""

    __tablename__ = "prior_entries"

    prior_id: Mapped[int] = mapped_column(ForeignKey("prior_versions.id"), primary_key=True)
    position: Mapped[int] = mapped_column(Integer, primary_key=True)
    revision_id: Mapped[int] = mapped_column(ForeignKey("entry_revisions.id"))
    weight: Mapped[float] = mapped_column(Float)
    ratings: Mapped[list] = mapped_column(JSON)
    discount: Mapped[dict] = mapped_column(JSON)

    revision: Mapped[EntryRevision] = relationship()
