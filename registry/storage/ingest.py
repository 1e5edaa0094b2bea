"""Writing a sheet's rows to the registry in bulk, inside the caller's one transaction.

Rows stream through in chunks of `CHUNK`: each chunk is planned (add, revise, present,
not_reverted) with a few queries whose `IN` lists hold at most one value a row of the chunk,
so no statement has a parameter per row of the sheet; its sources and studies are resolved
once per distinct key; its entries and revisions are written by one driver executemany
each (`insert_many`) and its tags by a Core `insert()`, not by ORM objects flushed one at a
time. A chunk is written before the next is planned, so a row repeating one earlier in the
sheet is found in the registry as added by this import. Nothing of a chunk is kept
afterwards but four integers a row in the plan log (and the plan of a row with changes or a
note) and the new entries' ids; a failure anywhere rolls the caller's transaction back, so
a bad last row writes nothing. Errors come in row order a chunk at a time: a bad cell is
found before a chunk is planned, an unknown source when it is written.

New entries and revisions are given their ids before they are inserted (`_new_ids`), so
that nothing is read back: correct on SQLite and PostgreSQL alike while other writers
insert at the same time. (Reading entries back by their unique fingerprints was about a
fifth faster on SQLite than `INSERT ... RETURNING` with `sort_by_parameter_order`, which
SQLAlchemy runs there one row a statement; taking the ids first is faster again.)
"""

from __future__ import annotations

import hashlib
from array import array
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from datetime import datetime
from itertools import islice
from pathlib import Path
from typing import Any

from sqlalchemy import JSON, Dialect, Table, bindparam, func, insert, select, text, update
from sqlalchemy.orm import Session, selectinload
from sqlalchemy.types import TypeEngine

from registry.errors import InputError
from registry.evidence.sheets import SheetRow
from registry.storage import db
from registry.storage.models import (
    Entry,
    EntryRevision,
    EntryTag,
    ImportRecord,
    Source,
    Study,
    utcnow,
)

# Rows planned and written together: the largest IN list of any statement.
CHUNK = 500
ACTIONS = ("add", "revise", "present", "not_reverted")
_CODE = {action: n for n, action in enumerate(ACTIONS)}
_WRITES = ("add", "revise")  # the actions that store a revision


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


class PlanLog:
    """Every row's plan, kept compactly: row, action, entry and revision as four integers in
    arrays (0 for none: ids and revision numbers start at 1), and the whole `RowPlan` only
    for a row with changes or a note. A million rows take about 25 MB."""

    def __init__(self) -> None:
        self._rows = array("q")
        self._actions = array("b")
        self._entries = array("q")
        self._revisions = array("q")
        self._details: dict[int, RowPlan] = {}
        self._counts = dict.fromkeys(ACTIONS, 0)

    def append(self, plan: RowPlan) -> None:
        if plan.changes or plan.note:
            self._details[len(self._rows)] = plan
        self._rows.append(plan.row)
        self._actions.append(_CODE[plan.action])
        self._entries.append(plan.entry or 0)
        self._revisions.append(plan.revision or 0)
        self._counts[plan.action] += 1

    def count(self, action: str) -> int:
        return self._counts[action]

    def planned(self, action: str, limit: int | None = None) -> list[RowPlan]:
        """The plans of `action` in row order, the first `limit` of them (all if None)."""
        code, found = _CODE[action], []
        for i, got in enumerate(self._actions):
            if got != code:
                continue
            if limit is not None and len(found) == limit:
                break
            found.append(
                self._details.get(i)
                or RowPlan(
                    self._rows[i], action, self._entries[i] or None, self._revisions[i] or None
                )
            )
        return found


@dataclass(frozen=True)
class ImportReport:
    path: str
    rows: int
    added: tuple[int, ...] = ()
    skipped: int = 0
    new_sources: tuple[str, ...] = ()
    dry_run: bool = False
    plan: PlanLog = field(default_factory=PlanLog, repr=False, compare=False)

    def planned(self, action: str, limit: int | None = None) -> list[RowPlan]:
        return self.plan.planned(action, limit)

    @property
    def message(self) -> str:
        counts = {a: self.plan.count(a) for a in ACTIONS}
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
            **{f"rows_{a}": [p.to_dict() for p in self.planned(a)] for a in ACTIONS},
        }


def file_sha256(path: Path) -> str:
    """The file's SHA-256, read in blocks (a large sheet is not held in memory for it)."""
    with path.open("rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


def merge_source(
    source: Source, fields: Mapping[str, object], where: str, key: str, row: int | None = None
) -> bool:
    """Fill the fields a source lacks; a field already set to another value is an error
    (the citation excepted: it is free text). Whether anything was filled."""
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


def revision_values(
    row: SheetRow,
    entry_id: int,
    number: int,
    source_id: int,
    study_id: int,
    reason: str,
    by: str | None,
) -> dict[str, Any]:
    """The columns of revision `number` of entry `entry_id` holding `row`."""
    return {
        "entry_id": entry_id,
        "revision": number,
        "source_id": source_id,
        "study_id": study_id,
        "quantity": row.quantity,
        "measure": row.measure,
        "reported": row.reported,
        "y": row.derived.y,
        "se": row.derived.se,
        "scale": row.derived.scale,
        "conversion": row.derived.conversion,
        "identity": row.fingerprint,
        "corrections": list(row.derived.corrections),
        "context": row.context,
        "extra": row.extra,
        "reason": reason,
        "created_by": by,
    }


def insert_many(
    session: Session, table: Table, rows: list[dict[str, Any]], shared: Mapping[str, Any]
) -> None:
    """Insert `rows` (each with the same columns) and the `shared` values into `table`, by
    one executemany on the driver.

    Each value is converted by its column type's bind processor for this database, as a Core
    `insert()` would do, without the per-row work of building its parameters; the shared
    values, and an empty JSON value, are converted once.
    """
    connection = session.connection()
    dialect = connection.dialect
    compiled = insert(table).compile(dialect=dialect, column_keys=[*rows[0], *shared])
    names = compiled.positiontup if compiled.positional else [*rows[0], *shared]
    assert names is not None and set(names) == {*rows[0], *shared}
    fixed = {name: _converter(table.c[name].type, dialect)(v) for name, v in shared.items()}
    convert = [(name, _converter(table.c[name].type, dialect)) for name in names]
    if compiled.positional:
        params: list[Any] = [
            tuple(fixed[n] if n in fixed else c(row[n]) for n, c in convert) for row in rows
        ]
    else:
        params = [{**{n: c(row[n]) for n, c in convert if n not in fixed}, **fixed} for row in rows]
    connection.exec_driver_sql(compiled.string, params)


def _converter(kind: TypeEngine[Any], dialect: Dialect) -> Callable[[Any], Any]:
    """The bind processor of `kind` on `dialect` (identity where it has none), with an empty
    JSON value converted once."""
    process = kind.dialect_impl(dialect).bind_processor(dialect)
    if process is None:
        return lambda value: value
    if not isinstance(kind, JSON):
        return process
    empty = {dict: process({}), list: process([])}
    return lambda value: (
        empty[type(value)] if type(value) in empty and not value else process(value)
    )


# The planning queries, built once: a chunk's values go in one expanding parameter.
_VALUES = bindparam("values", expanding=True)


def _revisions_where(match: Any, *columns: Any) -> Any:
    """`columns` of the revisions (joined to their entries) whose `match` column holds one
    of a chunk's values, by revision number: an entry's latest revision comes last."""
    return (
        select(*columns)
        .select_from(EntryRevision)
        .join(Entry, Entry.id == EntryRevision.entry_id)
        .where(match.in_(_VALUES))
        .order_by(EntryRevision.revision)
    )


# Revisions with one of the identities, with their entries' import and row.
_BY_IDENTITY = _revisions_where(
    EntryRevision.identity,
    *(EntryRevision.identity, EntryRevision.entry_id, EntryRevision.revision),
    *(Entry.import_id, Entry.row),
)
# The revisions of the entries with one of the row keys, with what a revision changes.
_BY_KEY = _revisions_where(
    Entry.row_key,
    *(Entry.row_key, Entry.id, EntryRevision.revision, EntryRevision.id),
    *(EntryRevision.identity, EntryRevision.context, EntryRevision.extra),
)


class BulkImport:
    """One import of rows into the registry through `session` (its transaction is the
    caller's). `keyed_plan` decides a row whose `row_key` names a stored entry."""

    def __init__(
        self,
        session: Session,
        path: Path,
        *,
        kind: str,
        keyed_plan: Callable[[SheetRow, Entry], RowPlan],
        reason: str | None = None,
        create_sources: bool = True,
        by: str | None = None,
    ) -> None:
        self.session = session
        self.path = path
        self.kind = kind
        self.keyed_plan = keyed_plan
        self.why = (reason or "").strip()
        self.create_sources = create_sources
        self.by = by
        self.now: datetime = utcnow()
        self.record: int | None = None  # the import record, made with the first entry added
        self.rows = 0
        self.added = array("q")
        self.new_sources: list[str] = []
        self.log = PlanLog()

    def run(self, rows: Iterable[SheetRow], *, dry_run: bool = False) -> ImportReport:
        """Plan and write every row, chunk by chunk; the report of what was done."""
        stream = iter(rows)
        while chunk := list(islice(stream, CHUNK)):
            self.rows += len(chunk)
            plans = self._plan(chunk)
            for plan in plans:
                self.log.append(plan)
            writes = [(r, p) for r, p in zip(chunk, plans, strict=True) if p.action in _WRITES]
            if writes:
                self._write(writes)
            self.session.flush()
            self.session.expunge_all()  # nothing of a chunk stays in memory
        added = self.log.count("add")
        if self.record is not None:
            self.session.execute(
                update(ImportRecord)
                .where(ImportRecord.id == self.record)
                .values(added=added, skipped=self.rows - added)
            )
        return ImportReport(
            str(self.path),
            self.rows,
            () if dry_run else tuple(self.added),
            self.log.count("present"),
            tuple(self.new_sources),
            dry_run,
            self.log,
        )

    def _plan(self, rows: list[SheetRow]) -> list[RowPlan]:
        """Decide, row by row, whether a row adds, revises or is already present, from a few
        queries over the chunk: keyed entries' heads, revisions by identity, their heads."""
        session = self.session
        keyed = self._keyed(rows)
        known = {
            identity: (entry_id, revision, import_id, first)
            for identity, entry_id, revision, import_id, first in session.execute(
                _BY_IDENTITY, {"values": [r.fingerprint for r in rows]}
            )
        }
        heads = db.reads_over(session).latest_revisions({k[0] for k in known.values()})
        plans, seen = [], {}
        for row in rows:
            if row.row_key in keyed:
                plans.append(keyed[row.row_key])
            elif row.fingerprint in known:
                entry_id, revision, import_id, first = known[row.fingerprint]
                if self.record is not None and import_id == self.record:  # added by this import
                    plans.append(RowPlan(row.row, "present", note=f"same as row {first}"))
                    continue
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

    def _keyed(self, rows: list[SheetRow]) -> dict[str, RowPlan]:
        """The plans of the rows whose `row_key` names a stored entry, by key.

        A row equal to its entry's current revision (same identity, context, extra cells and
        tags: the cells a revision changes) is present, decided from the heads alone; only
        the other keyed rows load their entries' histories for `keyed_plan`.
        """
        session = self.session
        by_key = {r.row_key: r for r in rows if r.row_key}
        if not by_key:
            return {}
        heads = {}  # row key -> (entry id, revision number, revision id, identity, context, extra)
        for key, *head in session.execute(_BY_KEY, {"values": list(by_key)}):
            heads[key] = head
        tags: dict[int, list[str]] = {}
        if heads:
            for revision_id, tag in session.execute(
                select(EntryTag.revision_id, EntryTag.tag)
                .where(EntryTag.revision_id.in_([h[2] for h in heads.values()]))
                .order_by(EntryTag.tag)
            ):
                tags.setdefault(revision_id, []).append(tag)
        plans, changed = {}, []
        for key, (entry, number, revision_id, identity, context, extra) in heads.items():
            row = by_key[key]
            same = (identity, context, extra) == (row.fingerprint, row.context, row.extra)
            if same and tuple(tags.get(revision_id, ())) == row.tags:
                plans[key] = RowPlan(row.row, "present", entry, number)
            else:
                changed.append(key)
        if changed:
            for entry in session.scalars(
                select(Entry)
                .where(Entry.row_key.in_(changed))
                .options(
                    selectinload(Entry.revisions).options(
                        selectinload(EntryRevision.source),
                        selectinload(EntryRevision.study),
                        selectinload(EntryRevision.tags),
                    )
                )
            ):
                assert entry.row_key is not None
                plans[entry.row_key] = self.keyed_plan(by_key[entry.row_key], entry)
        return plans

    def _write(self, writes: list[tuple[SheetRow, RowPlan]]) -> None:
        """Store the chunk's new entries and revisions (and their tags) in bulk."""
        session = self.session
        sources = self._sources([r for r, _ in writes])
        studies = self._studies([r.study for r, _ in writes])
        fresh = [r for r, p in writes if p.action == "add"]
        ids = iter(self._entries(fresh))
        name = self.path.name
        revisions, revision_ids = [], iter(self._new_ids(EntryRevision, len(writes)))
        for row, plan in writes:
            if plan.action == "add":
                entry, number, why = next(ids), 1, f"imported from {name} row {row.row}"
            else:
                assert plan.entry is not None and plan.revision is not None
                entry, number = plan.entry, plan.revision
                why = self.why or f"re-imported from {name} row {row.row}"
            values = revision_values(
                row, entry, number, sources[row.source], studies[row.study], why, self.by
            )
            revisions.append({**values, "id": next(revision_ids)})
        insert_many(session, EntryRevision.__table__, revisions, {"created_at": self.now})
        tags = [
            {"revision_id": values["id"], "tag": tag}
            for values, (row, _) in zip(revisions, writes, strict=True)
            for tag in row.tags
        ]
        if tags:
            session.execute(insert(EntryTag.__table__), tags)

    def _new_ids(self, model: type[Entry] | type[EntryRevision], count: int) -> list[int]:
        """`count` ids for rows about to be inserted into `model`'s table, so that no insert
        has to be read back: on PostgreSQL from the table's sequence (never handed out twice,
        whoever else inserts), on SQLite after the largest id (the write transaction began
        IMMEDIATE, so no other writer inserts until it ends)."""
        table = model.__table__.name
        if self.session.get_bind().dialect.name == "postgresql":
            return sorted(
                self.session.scalars(
                    text(
                        f"SELECT nextval(pg_get_serial_sequence('{table}', 'id')) "
                        "FROM generate_series(1, :count)"
                    ),
                    {"count": count},
                )
            )
        last = self.session.scalar(select(func.coalesce(func.max(model.id), 0)))
        return list(range(last + 1, last + 1 + count))

    def _entries(self, rows: list[SheetRow]) -> list[int]:
        """Insert entries for `rows` (the import record first, if this is the first); their
        ids in the order of `rows`."""
        if not rows:
            return []
        session = self.session
        if self.record is None:
            self.record = session.scalar(
                insert(ImportRecord)
                .values(
                    kind=self.kind,
                    path=str(self.path),
                    sha256=file_sha256(self.path),
                    added=0,
                    skipped=0,
                    imported_at=self.now,
                    created_by=self.by,
                )
                .returning(ImportRecord.id)
            )
        ids = self._new_ids(Entry, len(rows))
        insert_many(
            session,
            Entry.__table__,
            [
                {"id": entry_id, "fingerprint": r.fingerprint, "row_key": r.row_key, "row": r.row}
                for entry_id, r in zip(ids, rows, strict=True)
            ],
            {"import_id": self.record, "created_at": self.now},
        )
        self.added.extend(ids)
        return ids

    def _sources(self, rows: list[SheetRow]) -> dict[str, int]:
        """Source ids by key for `rows`, read in one query; a row's source fields fill in
        what its source lacks; an unknown key makes a source, or with `create_sources` off is
        an error naming the first row that has it."""
        session, where = self.session, str(self.path)
        keys = list(dict.fromkeys(r.source for r in rows))
        found = {s.key: s for s in session.scalars(select(Source).where(Source.key.in_(keys)))}
        for row in rows:
            info: dict[str, object] = dict(row.source_info)
            if "year" in info:
                info["year"] = int(str(info["year"]))
            source = found.get(row.source)
            if source is not None:
                merge_source(source, info, where, row.source, row.row)
                continue
            if not self.create_sources:
                raise InputError(
                    f"no source with key {row.source!r}: import its reference with "
                    "`sources import` first (--known-sources refuses unknown keys)",
                    field="source",
                    row=row.row,
                    path=where,
                )
            found[row.source] = Source(key=row.source, created_by=self.by, **info)
            session.add(found[row.source])
            self.new_sources.append(row.source)
        session.flush()
        return {key: source.id for key, source in found.items()}

    def _studies(self, keys: list[str]) -> dict[str, int]:
        """Study ids by key, read in one query; a study not yet known is made."""
        session = self.session
        wanted = list(dict.fromkeys(keys))
        ids = dict(session.execute(select(Study.key, Study.id).where(Study.key.in_(wanted))).all())
        missing = [k for k in wanted if k not in ids]
        if missing:
            table = Study.__table__
            made = session.execute(
                insert(table).returning(table.c.key, table.c.id, sort_by_parameter_order=True),
                [{"key": k, "created_at": self.now} for k in missing],
            )
            ids.update(made.all())
        return ids
