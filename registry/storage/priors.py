"""Built priors in the registry: store a version (reading them is `registry.storage.reads`).

A version `NAME@N` is immutable. Storing a build whose digest equals the latest version's
stores nothing and returns that version; anything changed makes `N+1`.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import replace
from typing import Any

from sqlalchemy import select

from registry import __version__
from registry.errors import NotFoundError
from registry.storage import db
from registry.storage.ledger import Ledger
from registry.storage.models import EntryRevision, PriorEntry, PriorVersion
from registry.storage.views import StoredPrior, Use
from registry.values.built import BuildResult
from registry.values.frozen import thaw

__all__ = ["StoredPrior", "Use", "latest_version", "save_version"]


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
        reads = db.reads_over(session)
        if latest is not None and latest.digest == digest:
            return reads.prior(f"{name}@{latest.version}")
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
        return replace(reads.prior(f"{name}@{row.version}"), new=True)


def latest_version(ledger: Ledger, name: str) -> StoredPrior | None:
    """The latest version of `name`, or None if it was never built."""
    try:
        return ledger.prior(name)
    except NotFoundError:
        return None
