"""What reads of the registry return: plain frozen values, made from a row of a query
(`registry.storage.reads`) or from a model object the write path holds (`of`), by one rule.

Nothing here loads SQLAlchemy (the values layer and the standard library only), so that a
listing need not.
"""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING, Any

from registry.caution import CAUTION
from registry.values.built import BuildResult
from registry.values.frozen import freeze, thaw
from registry.values.prior import Prior

if TYPE_CHECKING:
    from registry.storage.models import EntryRevision, Source


def when(value: datetime | str | None) -> str | None:
    """A stored time in ISO form. SQLite hands back the text SQLAlchemy stored
    (`2026-12-02 05:58:33.123456`), PostgreSQL a datetime: both read as the same string."""
    if value is None:
        return None
    return (datetime.fromisoformat(value) if isinstance(value, str) else value).isoformat()


def document(value: Any) -> Any:
    """A JSON column's value: SQLite hands back its text, PostgreSQL's driver the object."""
    return json.loads(value) if isinstance(value, str) else value


# Columns of a source as `SourceView` holds them (the query's names and the model's).
SOURCE_COLUMNS = (
    "key", "citation", "doi", "year", "title", "authors", "journal", "retracted",
    "retraction_reason", "created_at", "created_by", "retracted_at", "retracted_by",
)  # fmt: skip


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
    def from_row(cls, row: Mapping[str, Any], entries: int = 0) -> SourceView:
        """A source from its `SOURCE_COLUMNS`."""
        return cls(
            row["key"],
            row["citation"],
            row["doi"],
            row["year"],
            row["title"],
            row["authors"],
            row["journal"],
            bool(row["retracted"]),
            row["retraction_reason"],
            entries,
            when(row["created_at"]),
            row["created_by"],
            when(row["retracted_at"]),
            row["retracted_by"],
        )

    @classmethod
    def of(cls, source: Source, entries: int = 0) -> SourceView:
        return cls.from_row({name: getattr(source, name) for name in SOURCE_COLUMNS}, entries)

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
    def from_row(
        cls, rev: Mapping[str, Any], source: Mapping[str, Any], study: str, tags: tuple[str, ...]
    ) -> EntryView:
        """A revision from its row in `entry_revisions`, its source's row and its study's key."""
        return cls(
            id=rev["entry_id"],
            revision=rev["revision"],
            source=source["key"],
            study=study,
            quantity=rev["quantity"],
            measure=rev["measure"],
            scale=rev["scale"],
            y=rev["y"],
            se=rev["se"],
            conversion=rev["conversion"],
            corrections=tuple(document(rev["corrections"])),
            reported=dict(document(rev["reported"])),
            context=dict(document(rev["context"])),
            tags=tags,
            extra=dict(document(rev["extra"])),
            reason=rev["reason"],
            created_at=when(rev["created_at"]) or "",
            citation=source["citation"],
            doi=source["doi"],
            retracted=bool(source["retracted"]),
            created_by=rev["created_by"],
            retraction_reason=source["retraction_reason"],
        )

    @classmethod
    def of(cls, rev: EntryRevision) -> EntryView:
        return cls.from_row(
            {name: getattr(rev, name) for name in REVISION_COLUMNS},
            {name: getattr(rev.source, name) for name in SOURCE_COLUMNS},
            rev.study.key,
            tuple(t.tag for t in rev.tags),
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


# Columns of a revision that `EntryView.from_row` reads.
REVISION_COLUMNS = (
    "id", "entry_id", "revision", "source_id", "study_id", "quantity", "measure", "scale", "y",
    "se", "conversion", "corrections", "reported", "context", "extra", "reason", "created_at",
    "created_by",
)  # fmt: skip


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
class Use:
    """An exact entry revision a prior was built from, its ratings, discount and share of the
    prior's information (`share`)."""

    id: int
    revision: int
    share: float
    ratings: tuple[Mapping[str, str], ...]
    discount: Mapping[str, float]

    def __post_init__(self) -> None:
        object.__setattr__(self, "ratings", freeze(list(self.ratings)))
        object.__setattr__(self, "discount", freeze(dict(self.discount)))

    def to_dict(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "revision": self.revision,
            "weight": self.share,
            "ratings": thaw(self.ratings),
            "discount": thaw(self.discount),
        }


@dataclass(frozen=True)
class StoredPrior:
    """A stored version: the prior value, its stored definition and result, and its state."""

    prior: Prior
    definition: Mapping[str, Any]
    result: BuildResult
    uses: tuple[Use, ...]
    software_version: str
    created_at: str
    new: bool = False
    created_by: str | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "definition", freeze(dict(self.definition)))

    @property
    def stale(self) -> tuple[str, ...]:
        return self.prior.stale

    def to_dict(self) -> dict[str, Any]:
        result = self.result
        return {
            **self.prior.to_dict(),
            "entries": [u.to_dict() for u in self.uses],
            "stale": bool(self.stale),
            "stale_reasons": list(self.stale),
            "pooled": thaw(result.pooled),
            "fit": thaw(result.fit),
            "robust": thaw(result.robust),
            "global_power": result.global_power,
            "target": result.target,
            "include_retracted": result.include_retracted,
            "plausible": thaw(result.plausible),
            "notes": list(result.notes),
            "software_version": self.software_version,
            "created_at": self.created_at,
            "created_by": self.created_by,
            "caution": CAUTION,
        }
