"""The registry as a library: everything the CLI does with sources and entries.

`Ledger.open(db)` gives a migrated registry; its methods take and return plain values
(frozen dataclasses) and do each write in one transaction, so a failed write changes nothing.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, func, select, tuple_
from sqlalchemy.orm import Session, aliased, joinedload, selectinload, sessionmaker

from registry.errors import InputError, NotFoundError
from registry.evidence.bibliography import read_bibliography
from registry.evidence.elicit import Elicitation, read_elicitation
from registry.evidence.sheets import COLUMNS, REQUIRED, SheetRow, iter_sheet, parse_row
from registry.storage import db
from registry.storage.ingest import (
    BulkImport,
    ImportReport,
    RowPlan,
    file_sha256,
    merge_source,
    revision_values,
)
from registry.storage.models import (
    Entry,
    EntryRevision,
    EntryTag,
    ImportRecord,
    Source,
    SourceRevision,
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
    created_at: str | None = None
    created_by: str | None = None
    retracted_at: str | None = None
    retracted_by: str | None = None

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
            _when(source.created_at),
            source.created_by,
            _when(source.retracted_at),
            source.retracted_by,
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
    created_by: str | None = None
    retraction_reason: str | None = None

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
            created_by=rev.created_by,
            retraction_reason=rev.source.retraction_reason,
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
    row_key: str | None = None

    def to_dict(self) -> dict[str, Any]:
        return {
            **self.current.to_dict(),
            "imported_from": self.imported_from,
            "row_key": self.row_key,
            "revisions": [r.to_dict() for r in self.revisions],
        }


@dataclass(frozen=True)
class SourceImportReport:
    path: str
    added: tuple[str, ...]
    completed: tuple[str, ...]
    unchanged: int
    updated: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "added": list(self.added),
            "completed": list(self.completed),
            "unchanged": self.unchanged,
            "updated": list(self.updated),
        }


def _when(moment: datetime | None) -> str | None:
    return None if moment is None else moment.isoformat()


# Source, study and tags come with the revisions (not one query a row when a view is made).
_WITH_PLACE = (
    joinedload(EntryRevision.source),
    joinedload(EntryRevision.study),
    selectinload(EntryRevision.tags),
)


def _head_revisions():  # type: ignore[no-untyped-def]
    """The current revision of every entry, as a query to filter further.

    A revision is current when no later revision of its entry exists: one probe of the
    (entry_id, revision) index a row, where a GROUP BY over every revision would read the
    whole table before the first row came out.
    """
    later = aliased(EntryRevision)
    newer = (
        select(later.id)
        .where(later.entry_id == EntryRevision.entry_id, later.revision > EntryRevision.revision)
        .exists()
    )
    return select(EntryRevision).where(~newer).options(*_WITH_PLACE)


# A tag on more than this many times the rows a page needs is matched in entry id order.
COMMON_TAG_FACTOR = 20


def entries_query(
    *,
    quantity: str | None = None,
    measure: str | None = None,
    tags: Sequence[str] = (),
    sources: Sequence[str] = (),
    ids: Iterable[int] = (),
    include_retracted: bool = False,
    tags_in_id_order: bool = False,
):  # type: ignore[no-untyped-def]
    """The query behind `Ledger.entries`, in entry id order (its plan is tested to use the
    indexes of migration 0005).

    A tag is matched from the tag index (every revision with the tag, then sorted by entry),
    or, with `tags_in_id_order`, by walking the entries in id order and probing each one's
    tags, which stops as soon as a page is full: far faster for a tag most entries carry.
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
            select(EntryTag.tag)
            .where(EntryTag.revision_id == EntryRevision.id, EntryTag.tag == tag)
            .exists()
            if tags_in_id_order
            else EntryRevision.id.in_(select(EntryTag.revision_id).where(EntryTag.tag == tag))
        )
    if sources:
        query = query.where(
            EntryRevision.source_id.in_(select(Source.id).where(Source.key.in_(list(sources))))
        )
    ids = list(ids)
    if ids:
        query = query.where(EntryRevision.entry_id.in_(ids))
    return query.order_by(EntryRevision.entry_id)


def sources_query():  # type: ignore[no-untyped-def]
    """Sources by key, each with the number of entries that have a revision citing it,
    counted on the (source, entry) index for the sources of a page only."""
    entries = (
        select(func.count(func.distinct(EntryRevision.entry_id)))
        .where(EntryRevision.source_id == Source.id)
        .scalar_subquery()
    )
    return select(Source, entries).order_by(Source.key)


SOURCE_METADATA = ("citation", "title", "authors", "journal", "doi", "year")


def _source_value(name: str, value: str, where: str) -> object:
    text = value.strip()
    if not text:
        return None
    if name != "year":
        return text
    if not text.isdigit() or len(text) != 4:
        raise InputError(f"must be a four-digit year, got {value!r}", field=name, path=where)
    return int(text)


def _revise_source(
    session: Session,
    source: Source,
    changes: Mapping[str, object],
    reason: str,
    by: str | None,
) -> None:
    """Apply `changes` to a source, keeping its metadata before and after as revisions; the
    change is recorded under `by`."""
    last = session.scalar(
        select(func.max(SourceRevision.revision)).where(SourceRevision.source_id == source.id)
    )
    if last is None:  # first edit: keep what was recorded until now
        session.add(
            SourceRevision(
                source_id=source.id,
                revision=1,
                fields=_metadata(source),
                reason="as first recorded",
                created_at=source.created_at,
                created_by=source.created_by,
            )
        )
        last = 1
    for name, value in changes.items():
        setattr(source, name, value)
    session.add(
        SourceRevision(
            source_id=source.id,
            revision=last + 1,
            fields=_metadata(source),
            reason=reason,
            created_by=by,
        )
    )
    session.flush()


def _metadata(source: Source) -> dict[str, object]:
    return {name: getattr(source, name) for name in SOURCE_METADATA}


def _keyed_plan(row: SheetRow, entry: Entry, allow_revert: bool) -> RowPlan:
    """A keyed row against its entry: present, a new revision, or a revert (kept back)."""
    views = [EntryView.of(r) for r in entry.revisions]
    head = views[-1]
    contents = [parse_row(v.cells).content for v in views]
    changes = {
        name: {"from": head.cells.get(name), "to": row.cells.get(name)}
        for name in sorted(set(contents[-1]) | set(row.content))
        if contents[-1].get(name) != row.content.get(name)
    }
    if not changes:
        return RowPlan(row.row, "present", entry.id, head.revision)
    older = [v.revision for v, c in zip(views, contents, strict=True) if c == row.content]
    if older and not allow_revert:
        return RowPlan(
            row.row, "not_reverted", entry.id, older[-1], changes,
            f"the row is revision {older[-1]}; the entry is at revision {head.revision}",
        )  # fmt: skip
    return RowPlan(row.row, "revise", entry.id, head.revision + 1, changes)


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
        self,
        path: str | Path,
        *,
        update: bool = False,
        reason: str | None = None,
        user: str | None = None,
        encoding: str | None = None,
    ) -> SourceImportReport:
        """Add a bibliography's references; fill in fields a stub source lacks. The import and
        new sources are recorded under `user` (`registry.storage.db.who`).

        A reference whose key exists with a different value for a field already set is an
        error unless `update`: then the source's metadata takes the file's values as a new
        source revision (`reason`, else "updated from FILE"), the old values kept.
        """
        path = Path(path)
        records = read_bibliography(path, encoding=encoding)
        added, completed, updated, unchanged = [], [], [], 0
        why = (reason or "").strip() or f"updated from {path.name}"
        by = db.who(user)
        with self.transaction() as session:
            for record in records:
                source = session.scalar(select(Source).where(Source.key == record.key))
                if source is None:
                    session.add(Source(key=record.key, created_by=by, **record.fields()))
                    added.append(record.key)
                    continue
                if update:
                    differ = {
                        k: v
                        for k, v in record.fields().items()
                        if str(getattr(source, k)) != str(v)
                    }
                    if differ:
                        _revise_source(session, source, differ, why, by)
                        updated.append(record.key)
                    else:
                        unchanged += 1
                    continue
                changes = merge_source(source, record.fields(), str(path), record.key)
                if changes:
                    completed.append(record.key)
                else:
                    unchanged += 1
            session.add(
                ImportRecord(
                    kind="bibliography",
                    path=str(path),
                    sha256=file_sha256(path),
                    added=len(added),
                    skipped=unchanged,
                    created_by=by,
                )
            )
        return SourceImportReport(
            str(path), tuple(added), tuple(completed), unchanged, tuple(updated)
        )

    def edit_source(
        self, key: str, changes: Mapping[str, str], reason: str, *, user: str | None = None
    ) -> SourceView:
        """Change a source's metadata as a new source revision (recorded under `user`); an
        empty value clears a field.

        The values before the first edit are kept as revision 1, so nothing is lost.
        """
        where = f"source {key}"
        if not reason.strip():
            raise InputError("an edit needs a reason", field="--reason", path=where)
        if not changes:
            raise InputError("give at least one --set FIELD=VALUE", field="--set", path=where)
        values: dict[str, object] = {}
        for name, value in changes.items():
            if name not in SOURCE_METADATA:
                raise InputError(
                    f"not a field of a source; one of {', '.join(SOURCE_METADATA)}",
                    field=name,
                    path=where,
                )
            values[name] = _source_value(name, value, where)
        with self.transaction() as session:
            source = session.scalar(select(Source).where(Source.key == key))
            if source is None:
                raise NotFoundError(f"no source with key {key!r}")
            differ = {k: v for k, v in values.items() if getattr(source, k) != v}
            if not differ:
                raise InputError("the changes leave the source as it is", field="--set", path=where)
            _revise_source(session, source, differ, reason.strip(), db.who(user))
            return SourceView.of(source)

    def source_history(self, key: str) -> list[dict[str, Any]]:
        """Every recorded version of a source's metadata, oldest first (empty if never edited)."""
        with self._sessions() as session:
            source = session.scalar(select(Source).where(Source.key == key))
            if source is None:
                raise NotFoundError(f"no source with key {key!r}")
            return [
                {
                    "revision": r.revision,
                    "fields": dict(r.fields),
                    "reason": r.reason,
                    "created_at": r.created_at.isoformat(),
                    "created_by": r.created_by,
                }
                for r in session.scalars(
                    select(SourceRevision)
                    .where(SourceRevision.source_id == source.id)
                    .order_by(SourceRevision.revision)
                )
            ]

    def sources(self, *, limit: int | None = None, offset: int = 0) -> list[SourceView]:
        """Sources by key, `limit` of them (all if None) after the first `offset`; each with
        the number of entries that have a revision citing it."""
        query = sources_query().offset(offset)
        if limit is not None:
            query = query.limit(limit)
        with self._sessions() as session:
            return [SourceView.of(s, n) for s, n in session.execute(query)]

    @db.retried
    def retract(self, key: str, reason: str, *, user: str | None = None) -> SourceView:
        """Flag a source as retracted; nothing is deleted and priors built on it say so.
        The retraction is recorded under `user` (`registry.storage.db.who`)."""
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
            source.retracted_by = db.who(user)
            return SourceView.of(source)

    # entries -------------------------------------------------------------------------------

    def import_sheet(
        self,
        path: str | Path,
        *,
        dry_run: bool = False,
        decimal_comma: bool = False,
        reason: str | None = None,
        allow_revert: bool = False,
        create_sources: bool = True,
        user: str | None = None,
        encoding: str | None = None,
    ) -> ImportReport:
        """Import an extraction sheet, every row or none: one bad row writes nothing. The
        import, its entries and new sources are recorded under `user` (`db.who`).

        A row is matched to an entry by its `row_key` when it has one, else by its identity
        (`sheets.identity`: canonical numbers, source, study, quantity, measure) against every
        stored revision. A keyed row whose cells differ from its entry's current revision
        adds a revision (`reason`, else "re-imported from FILE"); one that equals an older
        revision is left alone (`not_reverted`) unless `allow_revert`. A source key not in
        the registry is an error unless `create_sources`.
        """
        path = Path(path)
        return self._import_rows(
            path,
            lambda: iter_sheet(path, decimal_comma=decimal_comma, encoding=encoding),
            kind="sheet",
            dry_run=dry_run,
            reason=reason,
            allow_revert=allow_revert,
            create_sources=create_sources,
            user=user,
        )

    def import_elicitation(
        self,
        path: str | Path,
        *,
        family: str = "normal",
        pool: str | None = None,
        dry_run: bool = False,
        decimal_comma: bool = False,
        create_sources: bool = True,
        user: str | None = None,
    ) -> tuple[ImportReport, Elicitation]:
        """Fit a judgement sheet (`evidence.elicit`) and store one entry per expert and
        quantity, design `expert`, plus one per pool; fits already stored are not added again.
        """
        path = Path(path)
        elicitation = read_elicitation(path, family=family, pool=pool, decimal_comma=decimal_comma)
        report = self._import_rows(
            path,
            elicitation.rows,
            kind="elicitation",
            dry_run=dry_run,
            create_sources=create_sources,
            user=user,
        )
        return report, elicitation

    @db.retried
    def _import_rows(
        self,
        path: Path,
        rows: Callable[[], Iterable[SheetRow]],
        *,
        kind: str,
        dry_run: bool,
        reason: str | None = None,
        allow_revert: bool = False,
        create_sources: bool = True,
        user: str | None = None,
    ) -> ImportReport:
        """Plan and write `rows()` in bulk (`storage.ingest`), all in one transaction (rolled
        back for a dry run); `rows` is called afresh when a race makes the write run again."""
        with self.transaction(commit=not dry_run) as session:
            return BulkImport(
                session,
                path,
                kind=kind,
                keyed_plan=functools.partial(_keyed_plan, allow_revert=allow_revert),
                reason=reason,
                create_sources=create_sources,
                by=db.who(user),
            ).run(rows(), dry_run=dry_run)

    @staticmethod
    def _add_revision(
        session: Session,
        entry_id: int,
        number: int,
        row: SheetRow,
        source: Source,
        reason: str,
        by: str | None,
    ) -> EntryRevision:
        study = session.scalar(select(Study).where(Study.key == row.study))
        if study is None:
            study = Study(key=row.study)
            session.add(study)
            session.flush()
        revision = EntryRevision(
            **revision_values(row, entry_id, number, source.id, study.id, reason, by)
        )
        session.add(revision)
        session.flush()
        session.add_all(EntryTag(revision_id=revision.id, tag=t) for t in row.tags)
        return revision

    def entries(
        self, *, limit: int | None = None, offset: int = 0, **filters: Any
    ) -> list[EntryView]:
        """Current revisions of the entries that match every filter given (`entries_query`'s
        keywords: quantity, measure, tags (all of them), sources, ids, include_retracted), by
        id: `limit` of them (all if None) after the first `offset`.

        Entries from retracted sources are left out unless `include_retracted` is True.
        """
        if filters.get("ids"):
            filters["ids"] = [db.check_id(i, "--id") for i in filters["ids"]]
        with self._sessions() as session:
            query = entries_query(
                **filters,
                tags_in_id_order=limit is not None
                and self._tags_are_common(session, filters.get("tags", ()), offset + limit),
            )
            query = query.offset(offset)
            if limit is not None:
                query = query.limit(limit)
            return [EntryView.of(r) for r in session.scalars(query)]

    @staticmethod
    def _tags_are_common(session: Session, tags: Sequence[str], wanted: int) -> bool:
        """Whether every tag is on so many revisions that walking the entries in id order
        fills `wanted` rows sooner than sorting the rarest tag's revisions would (each
        count is read from the tag index alone)."""
        return bool(tags) and all(
            session.scalar(select(func.count()).where(EntryTag.tag == tag))
            > COMMON_TAG_FACTOR * wanted
            for tag in tags
        )

    def entry(self, entry_id: int) -> EntryHistory:
        """An entry's current revision and its whole history, oldest first."""
        with self._sessions() as session:
            entry = session.get(Entry, db.check_id(entry_id, "ID"))
            if entry is None:
                raise NotFoundError(f"no entry with id {entry_id}")
            views = tuple(EntryView.of(r) for r in entry.revisions)
            origin = f"{entry.origin.path} row {entry.row}" if entry.origin else None
            return EntryHistory(views[-1], views, origin, entry.row_key)

    def revision(self, entry_id: int, revision: int) -> EntryView:
        return self.revisions([(db.check_id(entry_id, "ID"), db.check_id(revision, "revision"))])[0]

    def revisions(self, wanted: Sequence[tuple[int, int]]) -> list[EntryView]:
        """The given (entry id, revision) pairs, in the order given, read in one query."""
        pairs = list(wanted)
        query = select(EntryRevision).options(*_WITH_PLACE)
        query = query.where(tuple_(EntryRevision.entry_id, EntryRevision.revision).in_(pairs))
        with self._sessions() as session:
            found = {(r.entry_id, r.revision): EntryView.of(r) for r in session.scalars(query)}
        for entry_id, number in pairs:
            if (entry_id, number) not in found:
                raise NotFoundError(f"entry {entry_id} has no revision {number}")
        return [found[p] for p in pairs]

    @db.retried
    def revise(
        self,
        entry_id: int,
        changes: Mapping[str, str],
        reason: str,
        *,
        user: str | None = None,
    ) -> EntryView:
        """Add a revision with `changes` applied (an empty value clears a cell), recorded under
        `user` (`registry.storage.db.who`).

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
            if current.context.get("design") == "expert" and "x_expert" in current.extra:
                raise InputError(
                    "an elicited entry is fitted from its judgement sheet: correct the sheet "
                    "and run `elicit` again",
                    path=where,
                )
            row = self._revised_row(current, changes, where)
            source = session.scalar(select(Source).where(Source.key == row.source))
            if source is None:
                raise InputError(f"no source with key {row.source!r}", field="source", path=where)
            rev = self._add_revision(
                session,
                entry_id,
                current.revision + 1,
                replace(row, row=0),
                source,
                reason.strip(),
                db.who(user),
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
                "sources are corrected by `sources edit`, not on an entry",
                field=next(k for k in ("citation", "doi", "year") if k in cells),
                path=where,
            )
        try:
            row = parse_row(cells)
        except InputError as error:
            raise error.located(path=where) from None
        if row.content == parse_row(current.cells).content:
            raise InputError("the changes leave the entry as it is", field="--set", path=where)
        return row
