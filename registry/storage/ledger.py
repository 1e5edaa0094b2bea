"""The registry as a library: everything the CLI does with sources and entries.

`Ledger.open(db)` gives a migrated registry; its methods take and return plain values
(frozen dataclasses) and do each write in one transaction, so a failed write changes nothing.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, func, select
from sqlalchemy.orm import Session, sessionmaker

from registry.errors import InputError, NotFoundError
from registry.evidence.bibliography import read_bibliography
from registry.evidence.sheets import COLUMNS, REQUIRED, SheetRow, parse_row, read_sheet
from registry.storage import db
from registry.storage.models import (
    Entry,
    EntryRevision,
    EntryTag,
    ImportRecord,
    Source,
    Study,
)


@dataclass(frozen=True)
class SourceView:
    key: str
    citation: str | None
    doi: str | None
    year: int | None
    title: str | None
    authors: str | None
    journal: str | None
    retracted: bool
    retraction_reason: str | None
    entries: int

    @classmethod
    def of(cls, source: Source, entries: int = 0) -> SourceView:
        return cls(
            source.key,
            source.citation,
            source.doi,
            source.year,
            source.title,
            source.authors,
            source.journal,
            source.retracted,
            source.retraction_reason,
            entries,
        )

    def to_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


@dataclass(frozen=True)
class EntryView:
    """One revision of an entry, with what a reviewer needs to place it."""

    id: int
    revision: int
    source: str
    study: str
    quantity: str
    measure: str
    scale: str
    y: float
    se: float
    conversion: str
    corrections: tuple[str, ...]
    reported: dict[str, str]
    context: dict[str, str]
    tags: tuple[str, ...]
    extra: dict[str, str]
    reason: str
    created_at: str
    citation: str | None = None
    doi: str | None = None
    retracted: bool = False

    @classmethod
    def of(cls, rev: EntryRevision) -> EntryView:
        return cls(
            id=rev.entry_id,
            revision=rev.revision,
            source=rev.source.key,
            study=rev.study.key,
            quantity=rev.quantity,
            measure=rev.measure,
            scale=rev.scale,
            y=rev.y,
            se=rev.se,
            conversion=rev.conversion,
            corrections=tuple(rev.corrections),
            reported=dict(rev.reported),
            context=dict(rev.context),
            tags=tuple(t.tag for t in rev.tags),
            extra=dict(rev.extra),
            reason=rev.reason,
            created_at=rev.created_at.isoformat(),
            citation=rev.source.citation,
            doi=rev.source.doi,
            retracted=rev.source.retracted,
        )

    @property
    def cells(self) -> dict[str, str]:
        """The entry as sheet cells, the form a revision edits."""
        return {
            "source": self.source,
            "study": self.study,
            "quantity": self.quantity,
            "measure": self.measure,
            **self.reported,
            **self.context,
            **({"tags": ";".join(self.tags)} if self.tags else {}),
            **self.extra,
        }

    def to_dict(self) -> dict[str, Any]:
        doc = dict(self.__dict__)
        doc["corrections"] = list(self.corrections)
        doc["tags"] = list(self.tags)
        return doc


@dataclass(frozen=True)
class EntryHistory:
    current: EntryView
    revisions: tuple[EntryView, ...]
    imported_from: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            **self.current.to_dict(),
            "imported_from": self.imported_from,
            "revisions": [r.to_dict() for r in self.revisions],
        }


@dataclass(frozen=True)
class ImportReport:
    path: str
    rows: int
    added: tuple[int, ...] = ()
    skipped: int = 0
    new_sources: tuple[str, ...] = ()
    dry_run: bool = False
    entries: tuple[SheetRow, ...] = field(default=(), repr=False)

    @property
    def message(self) -> str:
        what = "would add" if self.dry_run else "added"
        text = f"{self.path}: {self.rows} rows read, {what} {len(self.entries)} entries"
        if self.skipped:
            text += f", {self.skipped} already in the registry"
        if self.new_sources:
            text += f", {len(self.new_sources)} new sources"
        return text

    def to_dict(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "rows": self.rows,
            "added": list(self.added),
            "skipped": self.skipped,
            "new_sources": list(self.new_sources),
            "dry_run": self.dry_run,
        }


@dataclass(frozen=True)
class SourceImportReport:
    path: str
    added: tuple[str, ...]
    completed: tuple[str, ...]
    unchanged: int

    def to_dict(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "added": list(self.added),
            "completed": list(self.completed),
            "unchanged": self.unchanged,
        }


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _head_revisions():  # type: ignore[no-untyped-def]
    """The current revision of every entry, as a selectable to join on."""
    latest = (
        select(EntryRevision.entry_id, func.max(EntryRevision.revision).label("rev"))
        .group_by(EntryRevision.entry_id)
        .subquery()
    )
    return select(EntryRevision).join(
        latest,
        (EntryRevision.entry_id == latest.c.entry_id) & (EntryRevision.revision == latest.c.rev),
    )


class Ledger:
    """A migrated registry at one database URL."""

    def __init__(self, engine: Engine) -> None:
        self.engine = engine
        self._sessions = sessionmaker(engine, expire_on_commit=False)
        self._writes = sessionmaker(db.writer(engine), expire_on_commit=False)

    @classmethod
    def open(cls, location: str | None = None) -> Ledger:
        """Open (and on first use create and migrate) the registry at `location`."""
        engine = db.make_engine(db.resolve_url(location))
        db.ensure_schema(engine)
        return cls(engine)

    @property
    def url(self) -> str:
        return self.engine.url.render_as_string(hide_password=True)

    def session(self) -> Session:
        """A session for reading; writes go through `transaction`."""
        return self._sessions()

    def transaction(self, *, commit: bool = True):  # type: ignore[no-untyped-def]
        return db.transaction(self._writes, commit=commit)

    # sources -------------------------------------------------------------------------------

    @db.retried
    def import_sources(
        self, path: str | Path, *, encoding: str | None = None
    ) -> SourceImportReport:
        """Add a bibliography's references; fill in fields a stub source lacks.

        A reference whose key exists with a different value for a field already set is an
        error: a source is corrected deliberately, not by re-importing.
        """
        path = Path(path)
        records = read_bibliography(path, encoding=encoding)
        added, completed, unchanged = [], [], 0
        with self.transaction() as session:
            for record in records:
                source = session.scalar(select(Source).where(Source.key == record.key))
                if source is None:
                    session.add(Source(key=record.key, **record.fields()))
                    added.append(record.key)
                    continue
                changes = self._merge_source(source, record.fields(), str(path), record.key)
                if changes:
                    completed.append(record.key)
                else:
                    unchanged += 1
            session.add(
                ImportRecord(
                    kind="bibliography",
                    path=str(path),
                    sha256=_sha256(path),
                    added=len(added),
                    skipped=unchanged,
                )
            )
        return SourceImportReport(str(path), tuple(added), tuple(completed), unchanged)

    @staticmethod
    def _merge_source(
        source: Source, fields: Mapping[str, object], where: str, key: str, row: int | None = None
    ) -> bool:
        changed = False
        for name, value in fields.items():
            current = getattr(source, name)
            if current is None:
                setattr(source, name, value)
                changed = True
            elif str(current) != str(value) and name != "citation":
                raise InputError(
                    f"source {key!r} already has {name} {current!r:.80}, not {value!r:.80}",
                    field=name,
                    row=row,
                    path=where,
                )
        return changed

    def sources(self) -> list[SourceView]:
        with self._sessions() as session:
            counts = dict(
                session.execute(
                    select(Source.id, func.count(func.distinct(EntryRevision.entry_id)))
                    .join(EntryRevision, EntryRevision.source_id == Source.id)
                    .group_by(Source.id)
                ).all()
            )
            return [
                SourceView.of(s, counts.get(s.id, 0))
                for s in session.scalars(select(Source).order_by(Source.key))
            ]

    @db.retried
    def retract(self, key: str, reason: str) -> SourceView:
        """Flag a source as retracted; nothing is deleted and priors built on it say so."""
        if not reason.strip():
            raise InputError("a retraction needs a reason", field="--reason")
        with self.transaction() as session:
            source = session.scalar(select(Source).where(Source.key == key).with_for_update())
            if source is None:
                raise NotFoundError(f"no source with key {key!r}")
            if source.retracted:
                raise InputError(f"source {key!r} is already retracted", field="key")
            source.retracted = True
            source.retraction_reason = reason.strip()
            source.retracted_at = datetime.now(UTC)
            return SourceView.of(source)

    # entries -------------------------------------------------------------------------------

    @db.retried
    def import_sheet(
        self, path: str | Path, *, dry_run: bool = False, encoding: str | None = None
    ) -> ImportReport:
        """Import every row of an extraction sheet, or none: one bad row writes nothing.

        A row already in the registry (same cells, from any sheet) is skipped and counted.
        """
        path = Path(path)
        rows = read_sheet(path, encoding=encoding)
        with self.transaction(commit=not dry_run) as session:
            known = set(
                session.scalars(
                    select(Entry.fingerprint).where(
                        Entry.fingerprint.in_([r.fingerprint for r in rows])
                    )
                )
            )
            fresh, seen = [], set()
            for row in rows:
                if row.fingerprint in known or row.fingerprint in seen:
                    continue
                seen.add(row.fingerprint)
                fresh.append(row)
            new_sources: list[str] = []
            added = []
            if fresh:  # a sheet with nothing new leaves no trace at all
                record = ImportRecord(
                    kind="sheet",
                    path=str(path),
                    sha256=_sha256(path),
                    added=len(fresh),
                    skipped=len(rows) - len(fresh),
                )
                session.add(record)
            for row in fresh:
                source = self._source_for(session, row, str(path), new_sources)
                entry = Entry(fingerprint=row.fingerprint, origin=record, row=row.row)
                session.add(entry)
                session.flush()
                self._add_revision(
                    session, entry.id, 1, row, source, f"imported from {path.name} row {row.row}"
                )
                added.append(entry.id)
        return ImportReport(
            str(path),
            len(rows),
            () if dry_run else tuple(added),
            len(rows) - len(fresh),
            tuple(new_sources),
            dry_run,
            tuple(fresh),
        )

    @staticmethod
    def _source_for(session: Session, row: SheetRow, where: str, new: list[str]) -> Source:
        source = session.scalar(select(Source).where(Source.key == row.source))
        info: dict[str, object] = dict(row.source_info)
        if "year" in info:
            info["year"] = int(str(info["year"]))
        if source is None:
            source = Source(key=row.source, **info)
            session.add(source)
            session.flush()
            new.append(row.source)
        else:
            Ledger._merge_source(source, info, where, row.source, row.row)
        return source

    @staticmethod
    def _add_revision(
        session: Session, entry_id: int, number: int, row: SheetRow, source: Source, reason: str
    ) -> EntryRevision:
        study = session.scalar(select(Study).where(Study.key == row.study))
        if study is None:
            study = Study(key=row.study)
            session.add(study)
            session.flush()
        revision = EntryRevision(
            entry_id=entry_id,
            revision=number,
            source_id=source.id,
            study_id=study.id,
            quantity=row.quantity,
            measure=row.measure,
            reported=row.reported,
            y=row.derived.y,
            se=row.derived.se,
            scale=row.derived.scale,
            conversion=row.derived.conversion,
            corrections=list(row.derived.corrections),
            context=row.context,
            extra=row.extra,
            reason=reason,
        )
        session.add(revision)
        session.flush()
        session.add_all(EntryTag(revision_id=revision.id, tag=t) for t in row.tags)
        return revision

    def entries(
        self,
        *,
        quantity: str | None = None,
        measure: str | None = None,
        tags: Sequence[str] = (),
        sources: Sequence[str] = (),
        ids: Iterable[int] = (),
        include_retracted: bool = False,
    ) -> list[EntryView]:
        """Current revisions of the entries that match every filter given (tags: all of them).

        Entries from retracted sources are left out unless `include_retracted` is True.
        """
        query = _head_revisions()
        if not include_retracted:
            query = query.where(
                EntryRevision.source_id.in_(select(Source.id).where(Source.retracted.is_(False)))
            )
        if quantity:
            query = query.where(EntryRevision.quantity == quantity)
        if measure:
            query = query.where(EntryRevision.measure == measure)
        for tag in tags:
            query = query.where(
                EntryRevision.id.in_(select(EntryTag.revision_id).where(EntryTag.tag == tag))
            )
        if sources:
            query = query.where(
                EntryRevision.source_id.in_(select(Source.id).where(Source.key.in_(list(sources))))
            )
        ids = [db.check_id(i, "--id") for i in ids]
        if ids:
            query = query.where(EntryRevision.entry_id.in_(ids))
        with self._sessions() as session:
            return [
                EntryView.of(r) for r in session.scalars(query.order_by(EntryRevision.entry_id))
            ]

    def entry(self, entry_id: int) -> EntryHistory:
        """An entry's current revision and its whole history, oldest first."""
        with self._sessions() as session:
            entry = session.get(Entry, db.check_id(entry_id, "ID"))
            if entry is None:
                raise NotFoundError(f"no entry with id {entry_id}")
            views = tuple(EntryView.of(r) for r in entry.revisions)
            origin = f"{entry.origin.path} row {entry.row}" if entry.origin else None
            return EntryHistory(views[-1], views, origin)

    def revision(self, entry_id: int, revision: int) -> EntryView:
        with self._sessions() as session:
            rev = session.scalar(
                select(EntryRevision).where(
                    EntryRevision.entry_id == db.check_id(entry_id, "ID"),
                    EntryRevision.revision == db.check_id(revision, "revision"),
                )
            )
            if rev is None:
                raise NotFoundError(f"entry {entry_id} has no revision {revision}")
            return EntryView.of(rev)

    @db.retried
    def revise(self, entry_id: int, changes: Mapping[str, str], reason: str) -> EntryView:
        """Add a revision with `changes` applied (an empty value clears a cell).

        The derived numbers are recomputed and validated as on import. The current revision
        is read, and the next number taken, inside the write transaction, so that concurrent
        revisions of one entry each apply to the one before.
        """
        where = f"entry {entry_id}"
        if not reason.strip():
            raise InputError("a revision needs a reason", field="--reason", path=where)
        if not changes:
            raise InputError("give at least one --set FIELD=VALUE", field="--set", path=where)
        for name in changes:
            if name not in COLUMNS and not name.startswith("x_"):
                raise InputError("not a column of an entry", field=name, path=where)
            if name in REQUIRED and not changes[name]:
                raise InputError("a required value cannot be cleared", field=name, path=where)
        with self.transaction() as session:
            entry = session.get(Entry, db.check_id(entry_id, "ID"))
            if entry is None:
                raise NotFoundError(f"no entry with id {entry_id}")
            current = EntryView.of(entry.revisions[-1])
            row = self._revised_row(current, changes, where)
            source = session.scalar(select(Source).where(Source.key == row.source))
            if source is None:
                raise InputError(f"no source with key {row.source!r}", field="source", path=where)
            rev = self._add_revision(
                session, entry_id, current.revision + 1, replace(row, row=0), source, reason.strip()
            )
            session.flush()
            session.refresh(rev)
            return EntryView.of(rev)

    @staticmethod
    def _revised_row(current: EntryView, changes: Mapping[str, str], where: str) -> SheetRow:
        """The entry's cells with `changes` applied, validated and derived as on import."""
        cells = {**current.cells, **changes}
        cells = {k: v for k, v in cells.items() if v != ""}
        if "citation" in cells or "doi" in cells or "year" in cells:
            raise InputError(
                "sources are corrected by `sources import`, not on an entry",
                field=next(k for k in ("citation", "doi", "year") if k in cells),
                path=where,
            )
        try:
            row = parse_row(cells)
        except InputError as error:
            raise error.located(path=where) from None
        if row.fingerprint == parse_row(current.cells).fingerprint:
            raise InputError("the changes leave the entry as it is", field="--set", path=where)
        return row
