"""The registry as a library: everything the CLI does with sources and entries.

`Ledger.open(db)` gives a migrated registry; its methods take and return plain values
(frozen dataclasses) and do each write in one transaction, so a failed write changes nothing.
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from sqlalchemy import Connection, Engine, func, select, text
from sqlalchemy.orm import Session, selectinload, sessionmaker

from registry.errors import InputError, NotFoundError
from registry.evidence.bibliography import read_bibliography
from registry.evidence.elicit import Elicitation, read_elicitation
from registry.evidence.sheets import COLUMNS, REQUIRED, SheetRow, parse_row, read_sheet
from registry.storage import db, location
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
class RowPlan:
    """What an import does with one sheet row, and why."""

    row: int
    action: str  # add | revise | present | not_reverted
    entry: int | None = None
    revision: int | None = None  # the revision it adds, is present as, or would revert to
    changes: dict[str, dict[str, str | None]] = field(default_factory=dict)
    note: str = ""

    def to_dict(self) -> dict[str, Any]:
        doc: dict[str, Any] = {"row": self.row, "entry": self.entry, "revision": self.revision}
        if self.action in ("revise", "not_reverted"):
            doc["changes"] = self.changes
        if self.note:
            doc["note"] = self.note
        return doc


_ACTIONS = ("add", "revise", "present", "not_reverted")


@dataclass(frozen=True)
class ImportReport:
    path: str
    rows: int
    added: tuple[int, ...] = ()
    skipped: int = 0
    new_sources: tuple[str, ...] = ()
    dry_run: bool = False
    entries: tuple[SheetRow, ...] = field(default=(), repr=False)
    plan: tuple[RowPlan, ...] = ()

    def planned(self, action: str) -> list[RowPlan]:
        return [p for p in self.plan if p.action == action]

    @property
    def message(self) -> str:
        counts = {a: len(self.planned(a)) for a in _ACTIONS}
        add, revise = ("would add", "would revise") if self.dry_run else ("added", "revised")
        text = f"{self.path}: {self.rows} rows read, "
        if counts["add"] or counts["revise"]:
            text += f"{add} {counts['add']} entries, {revise} {counts['revise']}"
        else:
            text += "nothing added"
        if counts["present"]:
            text += f", {counts['present']} already in the registry"
        if counts["not_reverted"]:
            text += (
                f", {counts['not_reverted']} rows match an older revision and are left at the "
                "newer one (--allow-revert to bring them back)"
            )
        if self.new_sources:
            text += (
                f"; created {len(self.new_sources)} sources from the sheet, with no bibliography "
                f"record: {', '.join(self.new_sources)} (complete them with `sources import`)"
            )
        return text

    def to_dict(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "rows": self.rows,
            "added": list(self.added),
            "skipped": self.skipped,
            "new_sources": list(self.new_sources),
            "dry_run": self.dry_run,
            **{f"rows_{a}": [p.to_dict() for p in self.planned(a)] for a in _ACTIONS},
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


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


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


def reads_over(executor: Connection | Session) -> Reads:
    """The read queries through a SQLAlchemy connection or session (inside its transaction)."""

    def run(sql: str, params: Mapping[str, Any]) -> Sequence[Mapping[str, Any]]:
        return [row._mapping for row in executor.execute(text(sql), params)]

    return Reads(run)


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
            yield reads_over(connection)

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
                    created_by=by,
                )
            )
        return SourceImportReport(
            str(path), tuple(added), tuple(completed), unchanged, tuple(updated)
        )

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
                    f"source {key!r} already has {name} {current!r:.80}, not {value!r:.80}; "
                    "`sources edit` or `sources import --update` records a revision",
                    field=name,
                    row=row,
                    path=where,
                )
        return changed

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
        rows = read_sheet(path, decimal_comma=decimal_comma, encoding=encoding)
        return self._import_rows(
            path,
            rows,
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
            elicitation.rows(),
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
        rows: Sequence[SheetRow],
        *,
        kind: str,
        dry_run: bool,
        reason: str | None = None,
        allow_revert: bool = False,
        create_sources: bool = True,
        user: str | None = None,
    ) -> ImportReport:
        why = (reason or "").strip()
        by = db.who(user)
        with self.transaction(commit=not dry_run) as session:
            plans = self._plan(session, rows, allow_revert)
            new_sources: list[str] = []
            added = []
            fresh = [r for r, p in zip(rows, plans, strict=True) if p.action == "add"]
            record = None
            if fresh:  # a sheet with nothing new leaves no import record
                record = ImportRecord(
                    kind=kind,
                    path=str(path),
                    sha256=_sha256(path),
                    added=len(fresh),
                    skipped=len(rows) - len(fresh),
                    created_by=by,
                )
                session.add(record)
            for row, plan in zip(rows, plans, strict=True):
                if plan.action not in ("add", "revise"):
                    continue
                source = self._source_for(session, row, str(path), new_sources, by, create_sources)
                if plan.action == "add":
                    entry = Entry(
                        fingerprint=row.fingerprint, row_key=row.row_key, origin=record, row=row.row
                    )
                    session.add(entry)
                    session.flush()
                    self._add_revision(
                        session,
                        entry.id,
                        1,
                        row,
                        source,
                        f"imported from {path.name} row {row.row}",
                        by,
                    )
                    added.append(entry.id)
                else:
                    assert plan.entry is not None and plan.revision is not None
                    self._add_revision(
                        session,
                        plan.entry,
                        plan.revision,
                        row,
                        source,
                        why or f"re-imported from {path.name} row {row.row}",
                        by,
                    )
        present = sum(p.action == "present" for p in plans)
        return ImportReport(
            str(path),
            len(rows),
            () if dry_run else tuple(added),
            present,
            tuple(new_sources),
            dry_run,
            tuple(fresh),
            tuple(plans),
        )

    @staticmethod
    def _plan(session: Session, rows: Sequence[SheetRow], allow_revert: bool) -> list[RowPlan]:
        """Decide, row by row, whether a sheet row adds, revises or is already present.

        Entries and revisions are read in a few queries for the whole sheet, not per row.
        """
        keyed = {
            e.row_key: e
            for e in session.scalars(
                select(Entry)
                .where(Entry.row_key.in_([r.row_key for r in rows if r.row_key]))
                .options(
                    selectinload(Entry.revisions).options(
                        selectinload(EntryRevision.source),
                        selectinload(EntryRevision.study),
                        selectinload(EntryRevision.tags),
                    )
                )
            )
        }
        known = {
            identity: (entry_id, revision)
            for identity, entry_id, revision in session.execute(
                select(EntryRevision.identity, EntryRevision.entry_id, EntryRevision.revision)
                .where(EntryRevision.identity.in_([r.fingerprint for r in rows]))
                .order_by(EntryRevision.revision)  # the latest revision with an identity wins
            )
        }
        heads = dict(
            session.execute(
                select(EntryRevision.entry_id, func.max(EntryRevision.revision))
                .where(EntryRevision.entry_id.in_([e for e, _ in known.values()]))
                .group_by(EntryRevision.entry_id)
            ).all()
        )
        plans, seen = [], {}
        for row in rows:
            if row.row_key in keyed:
                plans.append(_keyed_plan(row, keyed[row.row_key], allow_revert))
            elif row.fingerprint in known:
                entry_id, revision = known[row.fingerprint]
                later = heads[entry_id] > revision
                note = f"the entry is now at revision {heads[entry_id]}" if later else ""
                plans.append(RowPlan(row.row, "present", entry_id, revision, note=note))
                if row.row_key:  # a key given to a row imported before it had one
                    entry = session.get(Entry, entry_id)
                    if entry is not None and entry.row_key is None:
                        entry.row_key = row.row_key
            elif row.fingerprint in seen:
                plans.append(
                    RowPlan(row.row, "present", note=f"same as row {seen[row.fingerprint]}")
                )
            else:
                seen[row.fingerprint] = row.row
                plans.append(RowPlan(row.row, "add"))
        return plans

    @staticmethod
    def _source_for(
        session: Session,
        row: SheetRow,
        where: str,
        new: list[str],
        by: str | None,
        create: bool = False,
    ) -> Source:
        source = session.scalar(select(Source).where(Source.key == row.source))
        info: dict[str, object] = dict(row.source_info)
        if "year" in info:
            info["year"] = int(str(info["year"]))
        if source is None:
            if not create:
                raise InputError(
                    f"no source with key {row.source!r}: import its reference with "
                    "`sources import` first (--known-sources refuses unknown keys)",
                    field="source",
                    row=row.row,
                    path=where,
                )
            source = Source(key=row.source, created_by=by, **info)
            session.add(source)
            session.flush()
            new.append(row.source)
        else:
            Ledger._merge_source(source, info, where, row.source, row.row)
        return source

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
            identity=row.fingerprint,
            corrections=list(row.derived.corrections),
            context=row.context,
            extra=row.extra,
            reason=reason,
            created_by=by,
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
