"""The registry as a library: everything the CLI does with sources and entries.

`Ledger.open(db)` gives a migrated registry; its methods take and return plain values
(frozen dataclasses) and do each write in one transaction, so a failed write changes nothing.
"""

from __future__ import annotations

import functools
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, func, select
from sqlalchemy.orm import Session, sessionmaker

from registry.errors import InputError, NotFoundError
from registry.evidence.bibliography import read_bibliography
from registry.evidence.elicit import Elicitation, read_elicitation
from registry.evidence.sheets import COLUMNS, REQUIRED, SheetRow, iter_sheet, parse_row
from registry.storage import db, location
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
from registry.storage.reads import Reads
from registry.storage.views import EntryHistory, EntryView, SourceView, StoredPrior


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
    def open(cls, where: str | None = None) -> Ledger:
        """Open (and on first use create and migrate) the registry at `where` (`--db`)."""
        engine = db.make_engine(location.resolve_url(where))
        db.ensure_schema(engine)
        return cls(engine)

    @property
    def url(self) -> str:
        return self.engine.url.render_as_string(hide_password=True)

    def session(self) -> Session:
        """A session for reading; writes go through `transaction`."""
        return self._sessions()

    @contextmanager
    def reading(self) -> Iterator[Reads]:
        """The read queries (`registry.storage.reads`) over one read transaction."""
        with self.engine.connect() as connection:
            yield db.reads_over(connection)

    def prior(self, label: str) -> StoredPrior:
        """`Reads.prior`: `NAME@N`, or the latest version of `NAME`."""
        with self.reading() as reads:
            return reads.prior(label)

    def priors(self) -> list[StoredPrior]:
        """`Reads.priors`: every stored version, by name, oldest version first."""
        with self.reading() as reads:
            return reads.priors()

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
        """`Reads.sources`."""
        with self.reading() as reads:
            return reads.sources(limit=limit, offset=offset)

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
        """`Reads.entries`: current revisions that match every filter, by id."""
        with self.reading() as reads:
            return reads.entries(limit=limit, offset=offset, **filters)

    def entry(self, entry_id: int) -> EntryHistory:
        """An entry's current revision and its whole history, oldest first."""
        with self.reading() as reads:
            return reads.entry(entry_id)

    def revision(self, entry_id: int, revision: int) -> EntryView:
        return self.revisions([(entry_id, revision)])[0]

    def revisions(self, wanted: Sequence[tuple[int, int]]) -> list[EntryView]:
        """The given (entry id, revision) pairs, in the order given, read in one query."""
        with self.reading() as reads:
            return reads.revisions(wanted)

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
            entry = session.get(Entry, location.check_id(entry_id, "ID"))
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
