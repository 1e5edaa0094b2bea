"""Built priors in the registry: store a version, read it back, list versions, say if it is stale.

A version `NAME@N` is immutable. Storing a build whose digest equals the latest version's
stores nothing and returns that version; anything changed makes `N+1`.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, selectinload

from registry import __version__
from registry.caution import CAUTION
from registry.errors import InputError, NotFoundError
from registry.storage import db
from registry.storage.ledger import Ledger
from registry.storage.models import EntryRevision, PriorEntry, PriorVersion
from registry.values.built import BuildResult
from registry.values.frozen import freeze, thaw
from registry.values.prior import EntryUse, Prior

LABEL = re.compile(r"(?P<name>[a-z0-9][a-z0-9_-]*)(@(?P<version>\d+))?")


def parse_label(text: str) -> tuple[str, int | None]:
    """NAME or NAME@N."""
    match = LABEL.fullmatch(text)
    if not match:
        raise InputError(f"expected NAME or NAME@VERSION, got {text!r}", field="prior")
    version = match.group("version")
    return match.group("name"), int(version) if version else None


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


def latest_revisions_query(entry_ids: Iterable[int]):  # type: ignore[no-untyped-def]
    """(entry id, latest revision) of each entry, read from the (entry, revision) index."""
    return (
        select(EntryRevision.entry_id, func.max(EntryRevision.revision))
        .where(EntryRevision.entry_id.in_(set(entry_ids)))
        .group_by(EntryRevision.entry_id)
    )


def _staleness(session: Session, row: PriorVersion) -> tuple[str, ...]:
    used = [use.revision for use in row.uses]
    latest = dict(session.execute(latest_revisions_query(rev.entry_id for rev in used)).all())
    reasons = []
    for rev in used:
        if latest[rev.entry_id] > rev.revision:
            reasons.append(
                f"entry {rev.entry_id} has revision {latest[rev.entry_id]}; this prior used "
                f"revision {rev.revision}"
            )
        if rev.source.retracted:
            reasons.append(
                f"source {rev.source.key} of entry {rev.entry_id} is retracted: "
                f"{rev.source.retraction_reason}"
            )
    return tuple(reasons)


def _stored(session: Session, row: PriorVersion, new: bool = False) -> StoredPrior:
    result = BuildResult.from_dict(row.result)
    definition = row.definition
    uses = tuple(
        Use(u.revision.entry_id, u.revision.revision, u.weight, u.ratings, u.discount)
        for u in row.uses
    )
    prior = Prior(
        name=row.name,
        version=row.version,
        digest=row.digest,
        scale=result.scale,
        components=result.components,
        parameter=definition["parameter"],
        quantity=definition["select.quantity"],
        measure=result.measure,
        ess=result.ess,
        entries=tuple(EntryUse(u.id, u.revision, u.share) for u in uses),
        stale=_staleness(session, row),
    )
    return StoredPrior(
        prior,
        definition,
        result,
        uses,
        row.software_version,
        row.created_at.isoformat(),
        new,
        row.created_by,
    )


# A version's uses with their revisions and sources, loaded with it (not one query a use).
_WITH_USES = (
    selectinload(PriorVersion.uses).joinedload(PriorEntry.revision).joinedload(EntryRevision.source)
)


def _find(session: Session, label: str) -> PriorVersion:
    name, version = parse_label(label)
    query = select(PriorVersion).where(PriorVersion.name == name).options(_WITH_USES)
    query = (
        query.where(PriorVersion.version == db.check_id(version, "prior"))
        if version is not None
        else query.order_by(PriorVersion.version.desc())
    )
    row = session.scalars(query).first()
    if row is None:
        raise NotFoundError(f"no prior {label!r} in the registry")
    return row


@db.retried
def save_version(
    ledger: Ledger,
    name: str,
    digest: str,
    definition: Mapping[str, Any],
    result: BuildResult,
    uses: Sequence[Use],
    *,
    user: str | None = None,
) -> StoredPrior:
    """Store a build as the next version of `name`, recorded under `user` (`db.who`), unless
    the latest has the same digest (then that version is returned, with `new` False). The
    number is taken inside the write transaction; a concurrent build that took it first makes
    this one run again."""
    with ledger.transaction() as session:
        latest = session.scalars(
            select(PriorVersion)
            .where(PriorVersion.name == name)
            .order_by(PriorVersion.version.desc())
        ).first()
        if latest is not None and latest.digest == digest:
            return _stored(session, latest)
        row = PriorVersion(
            name=name,
            version=(latest.version + 1) if latest else 1,
            digest=digest,
            definition=thaw(definition),
            result=result.to_dict(),
            software_version=__version__,
            created_by=db.who(user),
        )
        session.add(row)
        session.flush()
        for position, use in enumerate(uses):
            revision_id = session.scalar(
                select(EntryRevision.id).where(
                    EntryRevision.entry_id == use.id, EntryRevision.revision == use.revision
                )
            )
            session.add(
                PriorEntry(
                    prior_id=row.id,
                    position=position,
                    revision_id=revision_id,
                    weight=use.share,
                    ratings=thaw(use.ratings),
                    discount=thaw(use.discount),
                )
            )
        session.flush()
        session.refresh(row)
        return _stored(session, row, new=True)


def load_version(ledger: Ledger, label: str) -> StoredPrior:
    """`NAME@N`, or the latest version of `NAME`."""
    with ledger.session() as session:
        return _stored(session, _find(session, label))


def latest_version(ledger: Ledger, name: str) -> StoredPrior | None:
    """The latest version of `name`, or None if it was never built."""
    try:
        return load_version(ledger, name)
    except NotFoundError:
        return None


def list_versions(ledger: Ledger) -> list[StoredPrior]:
    """Every stored version, by name, oldest version first."""
    with ledger.session() as session:
        rows = session.scalars(
            select(PriorVersion)
            .order_by(PriorVersion.name, PriorVersion.version)
            .options(_WITH_USES)
        )
        return [_stored(session, r) for r in rows]
