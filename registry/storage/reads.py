"""The registry's read queries, written once in SQL that SQLite and PostgreSQL both run, and
executed either through a `Ledger`'s SQLAlchemy connection or, for a command that only
reads an up-to-date SQLite registry, through the standard library's `sqlite3` alone
(`registry.storage.readonly`).

Each query's plan on a large registry is tested (tests/test_query_plans.py): a page of a
listing is found through the indexes of migration 0005, never by reading whole tables.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from typing import Any, Protocol

from registry.errors import InputError, NotFoundError
from registry.storage import location
from registry.storage.views import (
    REVISION_COLUMNS,
    SOURCE_COLUMNS,
    EntryHistory,
    EntryView,
    SourceView,
    StoredPrior,
    Use,
    document,
    when,
)
from registry.values.built import BuildResult
from registry.values.prior import EntryUse, Prior

# Runs one query with named parameters (`:name`) and gives its rows as mappings.
Run = Callable[[str, Mapping[str, Any]], Sequence[Mapping[str, Any]]]

# At most this many values in one IN list (SQLite allows 32,766 parameters a statement).
CHUNK = 500
# No LIMIT, written so that SQLite and PostgreSQL both accept it after an OFFSET.
NO_LIMIT = 2**62
# A tag on more than this many times the rows a page needs is matched in entry id order.
COMMON_TAG_FACTOR = 20

_REVISION = ", ".join(f"r.{name}" for name in REVISION_COLUMNS)
# A revision is current when no later revision of its entry exists: one probe of the
# (entry_id, revision) index a row, where a GROUP BY over every revision would read the whole
# table before the first row came out.
_CURRENT = (
    "NOT EXISTS (SELECT 1 FROM entry_revisions later "
    "WHERE later.entry_id = r.entry_id AND later.revision > r.revision)"
)


LABEL = re.compile(r"(?P<name>[a-z0-9][a-z0-9_-]*)(@(?P<version>\d+))?")


def parse_label(text: str) -> tuple[str, int | None]:
    """NAME or NAME@N."""
    match = LABEL.fullmatch(text)
    if not match:
        raise InputError(f"expected NAME or NAME@VERSION, got {text!r}", field="prior")
    version = match.group("version")
    return match.group("name"), int(version) if version else None


def _chunks(values: Sequence[Any]) -> Iterator[Sequence[Any]]:
    for start in range(0, len(values), CHUNK):
        yield values[start : start + CHUNK]


def _in_list(name: str, values: Sequence[Any], params: dict[str, Any]) -> str:
    """`(:name0, :name1, ...)`, with the values put in `params`."""
    for i, value in enumerate(values):
        params[f"{name}{i}"] = value
    return "(" + ", ".join(f":{name}{i}" for i in range(len(values))) + ")"


def entries_sql(
    *,
    quantity: str | None = None,
    measure: str | None = None,
    tags: Sequence[str] = (),
    sources: Sequence[str] = (),
    ids: Sequence[int] = (),
    include_retracted: bool = False,
    tags_in_id_order: bool = False,
    limit: int | None = None,
    offset: int = 0,
) -> tuple[str, dict[str, Any]]:
    """The query behind `Reads.entries`: current revisions in entry id order.

    A tag is matched from the tag index (every revision with the tag, then sorted by entry),
    or, with `tags_in_id_order`, by walking the entries in id order and probing each one's
    tags, which stops as soon as a page is full: far faster for a tag most entries carry.
    """
    params: dict[str, Any] = {"limit": NO_LIMIT if limit is None else limit, "offset": offset}
    where = [_CURRENT]
    if not include_retracted:
        where.append("r.source_id IN (SELECT id FROM sources WHERE NOT retracted)")
    if quantity:
        where.append("r.quantity = :quantity")
        params["quantity"] = quantity
    if measure:
        where.append("r.measure = :measure")
        params["measure"] = measure
    for i, tag in enumerate(tags):
        params[f"tag{i}"] = tag
        where.append(
            f"EXISTS (SELECT 1 FROM entry_tags t WHERE t.revision_id = r.id AND t.tag = :tag{i})"
            if tags_in_id_order
            else f"r.id IN (SELECT revision_id FROM entry_tags WHERE tag = :tag{i})"
        )
    if sources:
        keys = _in_list("source", list(sources), params)
        where.append(f"r.source_id IN (SELECT id FROM sources WHERE key IN {keys})")
    if ids:
        where.append(f"r.entry_id IN {_in_list('id', list(ids), params)}")
    sql = (
        f"SELECT {_REVISION} FROM entry_revisions r WHERE {' AND '.join(where)} "
        "ORDER BY r.entry_id LIMIT :limit OFFSET :offset"
    )
    return sql, params


def sources_sql(limit: int | None = None, offset: int = 0) -> tuple[str, dict[str, Any]]:
    """Sources by key, each with the number of entries that have a revision citing it,
    counted on the (source, entry) index for the sources of a page only."""
    columns = ", ".join(f"s.{name}" for name in SOURCE_COLUMNS)
    sql = (
        f"SELECT {columns}, (SELECT count(DISTINCT r.entry_id) FROM entry_revisions r "
        "WHERE r.source_id = s.id) AS entries FROM sources s ORDER BY s.key "
        "LIMIT :limit OFFSET :offset"
    )
    return sql, {"limit": NO_LIMIT if limit is None else limit, "offset": offset}


class Readable(Protocol):
    """What reads a registry: `Reads`, or a `Ledger` (each call its own read transaction)."""

    def entries(self, **filters: Any) -> list[EntryView]: ...
    def entry(self, entry_id: int) -> EntryHistory: ...
    def revisions(self, wanted: Sequence[tuple[int, int]]) -> list[EntryView]: ...
    def prior(self, label: str) -> StoredPrior: ...
    def priors(self) -> list[StoredPrior]: ...


_PRIOR = (
    "SELECT id, name, version, digest, definition, result, software_version, created_at, "
    "created_by FROM prior_versions"
)


class Reads:
    """The read queries, over one read transaction (`run`)."""

    def __init__(self, run: Run) -> None:
        self.run = run

    def entries(
        self,
        *,
        quantity: str | None = None,
        measure: str | None = None,
        tags: Sequence[str] = (),
        sources: Sequence[str] = (),
        ids: Iterable[int] = (),
        include_retracted: bool = False,
        limit: int | None = None,
        offset: int = 0,
    ) -> list[EntryView]:
        """Current revisions of the entries that match every filter given (all the tags, any
        of the sources and ids), by id: `limit` of them (all if None) after the first
        `offset`. Entries from retracted sources are left out unless `include_retracted`."""
        wanted = [location.check_id(i, "--id") for i in ids]
        if len(wanted) > CHUNK:  # a long id list is read a chunk at a time
            found = [
                view
                for part in _chunks(sorted(set(wanted)))
                for view in self.entries(
                    quantity=quantity,
                    measure=measure,
                    tags=tags,
                    sources=sources,
                    ids=part,
                    include_retracted=include_retracted,
                )
            ]
            return found[offset:] if limit is None else found[offset : offset + limit]
        in_id_order = limit is not None and self._tags_are_common(tags, offset + limit)
        sql, params = entries_sql(
            quantity=quantity,
            measure=measure,
            tags=tags,
            sources=sources,
            ids=wanted,
            include_retracted=include_retracted,
            tags_in_id_order=in_id_order,
            limit=limit,
            offset=offset,
        )
        return self._views(self.run(sql, params))

    def _tags_are_common(self, tags: Sequence[str], wanted: int) -> bool:
        """Whether every tag is on so many revisions that walking the entries in id order
        fills `wanted` rows sooner than sorting the rarest tag's revisions would (each
        count is read from the tag index alone)."""
        return bool(tags) and all(
            self.run("SELECT count(*) AS n FROM entry_tags WHERE tag = :tag", {"tag": tag})[0]["n"]
            > COMMON_TAG_FACTOR * wanted
            for tag in tags
        )

    def sources(self, *, limit: int | None = None, offset: int = 0) -> list[SourceView]:
        """Sources by key, `limit` of them (all if None) after the first `offset`; each with
        the number of entries that have a revision citing it."""
        sql, params = sources_sql(limit, offset)
        return [SourceView.from_row(row, row["entries"]) for row in self.run(sql, params)]

    def entry(self, entry_id: int) -> EntryHistory:
        """An entry's current revision and its whole history, oldest first."""
        found = self.run(
            "SELECT e.row_key, e.row, i.path FROM entries e "
            "LEFT JOIN imports i ON i.id = e.import_id WHERE e.id = :id",
            {"id": location.check_id(entry_id, "ID")},
        )
        if not found:
            raise NotFoundError(f"no entry with id {entry_id}")
        revisions = self.run(
            f"SELECT {_REVISION} FROM entry_revisions r WHERE r.entry_id = :id ORDER BY r.revision",
            {"id": entry_id},
        )
        views = tuple(self._views(revisions))
        head = found[0]
        origin = f"{head['path']} row {head['row']}" if head["path"] is not None else None
        return EntryHistory(views[-1], views, origin, head["row_key"])

    def revisions(self, wanted: Sequence[tuple[int, int]]) -> list[EntryView]:
        """The given (entry id, revision) pairs, in the order given."""
        pairs = [(location.check_id(e, "ID"), location.check_id(n, "revision")) for e, n in wanted]
        found: dict[tuple[int, int], EntryView] = {}
        for part in _chunks(sorted(set(pairs))):
            params: dict[str, Any] = {}
            match = " OR ".join(
                f"(r.entry_id = :e{i} AND r.revision = :n{i})" for i in range(len(part))
            )
            for i, (entry_id, number) in enumerate(part):
                params[f"e{i}"], params[f"n{i}"] = entry_id, number
            rows = self.run(f"SELECT {_REVISION} FROM entry_revisions r WHERE {match}", params)
            found.update(((v.id, v.revision), v) for v in self._views(rows))
        for entry_id, number in pairs:
            if (entry_id, number) not in found:
                raise NotFoundError(f"entry {entry_id} has no revision {number}")
        return [found[p] for p in pairs]

    def prior(self, label: str) -> StoredPrior:
        """`NAME@N`, or the latest version of `NAME`."""
        name, version = parse_label(label)
        if version is None:
            sql = f"{_PRIOR} WHERE name = :name ORDER BY version DESC LIMIT 1"
        else:
            sql = f"{_PRIOR} WHERE name = :name AND version = :version"
        params = {"name": name, "version": location.check_id(version or 0, "prior")}
        rows = self.run(sql, params)
        if not rows:
            raise NotFoundError(f"no prior {label!r} in the registry")
        return self._stored(rows)[0]

    def priors(self) -> list[StoredPrior]:
        """Every stored version, by name, oldest version first."""
        return self._stored(self.run(f"{_PRIOR} ORDER BY name, version", {}))

    def _stored(self, rows: Sequence[Mapping[str, Any]]) -> list[StoredPrior]:
        """Stored priors from their rows, with their uses and whether each is stale: an entry
        it used has a later revision, or a source it used is retracted."""
        uses: dict[int, list[Mapping[str, Any]]] = {}
        for part in _chunks([row["id"] for row in rows]):
            params: dict[str, Any] = {}
            sql = (
                "SELECT u.prior_id, u.weight, u.ratings, u.discount, r.entry_id, r.revision, "
                "r.source_id FROM prior_entries u JOIN entry_revisions r ON r.id = u.revision_id "
                f"WHERE u.prior_id IN {_in_list('p', part, params)} ORDER BY u.prior_id, u.position"
            )
            for use in self.run(sql, params):
                uses.setdefault(use["prior_id"], []).append(use)
        used = [u for group in uses.values() for u in group]
        sources = self._by_id(
            "SELECT id, key, retracted, retraction_reason FROM sources WHERE id IN ",
            {u["source_id"] for u in used},
        )
        latest = self.latest_revisions({u["entry_id"] for u in used})
        return [_stored_prior(row, uses.get(row["id"], []), sources, latest) for row in rows]

    def latest_revisions(self, entry_ids: set[int]) -> dict[int, int]:
        """Each entry's latest revision number, read from the (entry, revision) index."""
        latest = {}
        for part in _chunks(sorted(entry_ids)):
            params: dict[str, Any] = {}
            sql = latest_revisions_sql(part, params)
            latest.update((row["entry_id"], row["latest"]) for row in self.run(sql, params))
        return latest

    def _views(self, revisions: Sequence[Mapping[str, Any]]) -> list[EntryView]:
        """Views of revision rows, their sources, studies and tags read a chunk at a time
        (three queries a page, not three a row)."""
        sources = self._by_id(
            f"SELECT id, {', '.join(SOURCE_COLUMNS)} FROM sources WHERE id IN ",
            {r["source_id"] for r in revisions},
        )
        studies = self._by_id(
            "SELECT id, key FROM studies WHERE id IN ", {r["study_id"] for r in revisions}
        )
        tags: dict[int, list[str]] = {}
        for part in _chunks([r["id"] for r in revisions]):
            params: dict[str, Any] = {}
            sql = (
                "SELECT revision_id, tag FROM entry_tags WHERE revision_id IN "
                f"{_in_list('r', part, params)} ORDER BY revision_id, tag"
            )
            for row in self.run(sql, params):
                tags.setdefault(row["revision_id"], []).append(row["tag"])
        return [
            EntryView.from_row(
                r,
                sources[r["source_id"]],
                studies[r["study_id"]]["key"],
                tuple(tags.get(r["id"], ())),
            )
            for r in revisions
        ]

    def _by_id(self, select: str, ids: set[int]) -> dict[int, Mapping[str, Any]]:
        rows: dict[int, Mapping[str, Any]] = {}
        for part in _chunks(sorted(ids)):
            params: dict[str, Any] = {}
            rows.update(
                (row["id"], row) for row in self.run(select + _in_list("i", part, params), params)
            )
        return rows


def latest_revisions_sql(entry_ids: Sequence[int], params: dict[str, Any]) -> str:
    """(entry id, latest revision) of each entry, read from the (entry, revision) index."""
    return (
        "SELECT entry_id, max(revision) AS latest FROM entry_revisions WHERE entry_id IN "
        f"{_in_list('e', entry_ids, params)} GROUP BY entry_id"
    )


def _stored_prior(
    row: Mapping[str, Any],
    uses: Sequence[Mapping[str, Any]],
    sources: Mapping[int, Mapping[str, Any]],
    latest: Mapping[int, int],
) -> StoredPrior:
    result = BuildResult.from_dict(document(row["result"]))
    definition = document(row["definition"])
    stale = []
    for use in uses:
        entry_id, number, source = use["entry_id"], use["revision"], sources[use["source_id"]]
        if latest[entry_id] > number:
            stale.append(
                f"entry {entry_id} has revision {latest[entry_id]}; this prior used "
                f"revision {number}"
            )
        if source["retracted"]:
            stale.append(
                f"source {source['key']} of entry {entry_id} is retracted: "
                f"{source['retraction_reason']}"
            )
    kept = tuple(
        Use(
            u["entry_id"],
            u["revision"],
            u["weight"],
            document(u["ratings"]),
            document(u["discount"]),
        )
        for u in uses
    )
    prior = Prior(
        name=row["name"],
        version=row["version"],
        digest=row["digest"],
        scale=result.scale,
        components=result.components,
        parameter=definition["parameter"],
        quantity=definition["select.quantity"],
        measure=result.measure,
        ess=result.ess,
        entries=tuple(EntryUse(u.id, u.revision, u.share) for u in kept),
        stale=tuple(stale),
    )
    return StoredPrior(
        prior,
        definition,
        result,
        kept,
        row["software_version"],
        when(row["created_at"]) or "",
        False,
        row["created_by"],
    )
