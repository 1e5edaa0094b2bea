"""Built priors in the registry: select, build, store, list, verify and trace.

A version `NAME@N` is immutable. Building again from unchanged inputs (same digest as the
latest version) stores nothing and returns that version; anything changed makes `N+1`.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import func, select

from registry import __version__
from registry.caution import CAUTION
from registry.errors import InputError, NotFoundError
from registry.priors.build import Construction, construct
from registry.priors.definition import Definition, definition_from_canonical
from registry.priors.selection import repeated_studies
from registry.priors.value import Component, EntryUse, Prior
from registry.storage.ledger import EntryView, Ledger
from registry.storage.models import EntryRevision, PriorEntry, PriorVersion

LABEL = re.compile(r"(?P<name>[a-z0-9][a-z0-9_-]*)(@(?P<version>\d+))?")


@dataclass(frozen=True)
class StoredPrior:
    """A stored version: the prior value, its stored definition and result, and its state."""

    prior: Prior
    definition: dict[str, Any]
    result: dict[str, Any]
    uses: tuple[dict[str, Any], ...]
    software_version: str
    created_at: str
    stale: tuple[str, ...] = ()
    new: bool = False

    def to_dict(self) -> dict[str, Any]:
        return {
            **self.prior.to_dict(),
            "entries": [dict(u) for u in self.uses],
            "stale": bool(self.stale),
            "stale_reasons": list(self.stale),
            "pooled": self.result["pooled"],
            "fit": self.result["fit"],
            "global_power": self.result["global_power"],
            "target": self.result["target"],
            "plausible": self.result["plausible"],
            "notes": self.result["notes"],
            "software_version": self.software_version,
            "created_at": self.created_at,
            "caution": CAUTION,
        }


def select_entries(ledger: Ledger, definition: Definition) -> list[EntryView]:
    """The current entries a definition selects; a study reported twice must be resolved."""
    chosen = ledger.entries(
        quantity=definition["select.quantity"],
        measure=definition["select.measure"],
        tags=definition["select.tags"],
        sources=definition["select.sources"],
    )
    excluded_tags = set(definition["select.exclude_tags"])
    excluded = set(definition["select.exclude"])
    chosen = [e for e in chosen if e.id not in excluded and not excluded_tags & set(e.tags)]
    known = {e.id for e in chosen}
    include = [i for i in definition["select.include"] if i not in known]
    if include:
        found = ledger.entries(ids=include)
        missing = sorted(set(include) - {e.id for e in found})
        if missing:
            raise InputError(
                f"no entry with id {missing[0]}", field="select.include", path=definition.path
            )
        chosen = sorted([*chosen, *found], key=lambda e: e.id)
    stands_for = definition["select.studies"]
    for study, ids in repeated_studies(chosen).items():
        keep = stands_for.get(study)
        if keep is None:
            raise InputError(
                f"study {study} is reported by entries {ids}; say which one stands "
                f"for it under [select.studies]",
                field="select.studies",
                path=definition.path,
            )
        if keep not in ids:
            raise InputError(
                f"entry {keep} is not one of study {study}'s entries {ids}",
                field="select.studies",
                path=definition.path,
            )
        chosen = [e for e in chosen if e.study != study or e.id == keep]
    if not chosen:
        raise InputError("the selection matches no entries", field="select", path=definition.path)
    return chosen


def _label(text: str) -> tuple[str, int | None]:
    match = LABEL.fullmatch(text)
    if not match:
        raise InputError(f"expected NAME or NAME@VERSION, got {text!r}", field="prior")
    version = match.group("version")
    return match.group("name"), int(version) if version else None


def _prior_value(row: PriorVersion, definition: dict[str, Any]) -> Prior:
    result = row.result
    return Prior(
        name=row.name,
        version=row.version,
        digest=row.digest,
        scale=result["scale"],
        components=tuple(Component.from_dict(c) for c in result["components"]),
        parameter=definition["parameter"],
        quantity=definition["select.quantity"],
        measure=result["measure"],
        ess=result["ess"],
        entries=tuple(
            EntryUse(u.revision.entry_id, u.revision.revision, u.weight) for u in row.uses
        ),
    )


def _staleness(session: Any, row: PriorVersion) -> tuple[str, ...]:
    reasons = []
    for use in row.uses:
        rev = use.revision
        latest = session.scalar(
            select(func.max(EntryRevision.revision)).where(EntryRevision.entry_id == rev.entry_id)
        )
        if latest > rev.revision:
            reasons.append(
                f"entry {rev.entry_id} has revision {latest}; this prior used "
                f"revision {rev.revision}"
            )
        if rev.source.retracted:
            reasons.append(
                f"source {rev.source.key} of entry {rev.entry_id} is retracted: "
                f"{rev.source.retraction_reason}"
            )
    return tuple(reasons)


def _stored(session: Any, row: PriorVersion, new: bool = False) -> StoredPrior:
    uses = tuple(
        {
            "id": u.revision.entry_id,
            "revision": u.revision.revision,
            "weight": u.weight,
            "ratings": u.ratings,
            "discount": u.discount,
        }
        for u in row.uses
    )
    return StoredPrior(
        _prior_value(row, row.definition),
        row.definition,
        row.result,
        uses,
        row.software_version,
        row.created_at.isoformat(),
        _staleness(session, row),
        new,
    )


def _find(session: Any, label: str) -> PriorVersion:
    name, version = _label(label)
    query = select(PriorVersion).where(PriorVersion.name == name)
    query = (
        query.where(PriorVersion.version == version)
        if version is not None
        else query.order_by(PriorVersion.version.desc())
    )
    row = session.scalars(query).first()
    if row is None:
        raise NotFoundError(f"no prior {label!r} in the registry")
    return row


def build_prior(ledger: Ledger, definition: Definition) -> StoredPrior:
    """Build `definition` on the registry's current entries and store it as a new version,
    unless the latest version has the same digest (then that version is returned)."""
    entries = select_entries(ledger, definition)
    built = construct(definition, entries)
    with ledger.transaction() as session:
        latest = session.scalars(
            select(PriorVersion)
            .where(PriorVersion.name == definition.name)
            .order_by(PriorVersion.version.desc())
        ).first()
        if latest is not None and latest.digest == built.digest:
            return _stored(session, latest)
        row = PriorVersion(
            name=definition.name,
            version=(latest.version + 1) if latest else 1,
            digest=built.digest,
            definition=definition.canonical(),
            result={**built.result, "measure": entries[0].measure},
            software_version=__version__,
        )
        session.add(row)
        session.flush()
        for position, rated in enumerate(built.rated):
            revision_id = session.scalar(
                select(EntryRevision.id).where(
                    EntryRevision.entry_id == rated.entry.id,
                    EntryRevision.revision == rated.entry.revision,
                )
            )
            session.add(
                PriorEntry(
                    prior_id=row.id,
                    position=position,
                    revision_id=revision_id,
                    weight=rated.share,
                    ratings=[r.to_dict() for r in rated.ratings],
                    discount=rated.discount.to_dict(),
                )
            )
        session.flush()
        session.refresh(row)
        return _stored(session, row, new=True)


def list_priors(ledger: Ledger) -> list[StoredPrior]:
    """Every stored version, newest version of each name last."""
    with ledger.session() as session:
        rows = session.scalars(
            select(PriorVersion).order_by(PriorVersion.name, PriorVersion.version)
        )
        return [_stored(session, r) for r in rows]


def get_prior(ledger: Ledger, label: str) -> StoredPrior:
    with ledger.session() as session:
        return _stored(session, _find(session, label))


@dataclass(frozen=True)
class Verification:
    label: str
    digest_matches: bool
    components_match: bool
    differences: tuple[str, ...] = ()
    stale: tuple[str, ...] = ()
    rebuilt: Construction | None = field(default=None, repr=False)

    @property
    def ok(self) -> bool:
        return self.digest_matches and self.components_match and not self.stale

    def to_dict(self) -> dict[str, Any]:
        return {
            "prior": self.label,
            "ok": self.ok,
            "digest_matches": self.digest_matches,
            "components_match": self.components_match,
            "differences": list(self.differences),
            "stale": list(self.stale),
        }


def verify_prior(ledger: Ledger, label: str) -> Verification:
    """Rebuild from the stored definition and the exact entry revisions used; compare."""
    stored = get_prior(ledger, label)
    definition = definition_from_canonical(stored.definition)
    entries = [ledger.revision(u["id"], u["revision"]) for u in stored.uses]
    rebuilt = construct(definition, entries)
    differences = []
    digest_ok = rebuilt.digest == stored.prior.digest
    if not digest_ok:
        differences.append(
            f"digest {rebuilt.digest[:12]} rebuilt, {stored.prior.digest[:12]} stored"
        )
    want = stored.result["components"]
    got = [c.to_dict() for c in rebuilt.components]
    components_ok = want == got
    if not components_ok:
        differences.append(f"components rebuilt as {got}, stored as {want}")
    return Verification(
        stored.prior.label, digest_ok, components_ok, tuple(differences), stored.stale, rebuilt
    )


def trace_prior(ledger: Ledger, label: str) -> dict[str, Any]:
    """Prior -> definition -> each entry (revision, ratings, weight) -> source -> reported
    numbers -> conversion -> y, se: what a reviewer needs without opening the database."""
    stored = get_prior(ledger, label)
    entries = []
    for use in stored.uses:
        view = ledger.revision(use["id"], use["revision"])
        entries.append(
            {
                "id": view.id,
                "revision": view.revision,
                "weight": use["weight"],
                "ratings": use["ratings"],
                "discount": use["discount"],
                "revision_reason": view.reason,
                "study": view.study,
                "source": {
                    "key": view.source,
                    "citation": view.citation,
                    "doi": view.doi,
                    "retracted": view.retracted,
                    "location": view.context.get("location"),
                },
                "reported": view.reported,
                "conversion": view.conversion,
                "corrections": list(view.corrections),
                "scale": view.scale,
                "y": view.y,
                "se": view.se,
                "context": view.context,
            }
        )
    return {
        "prior": stored.prior.label,
        "digest": stored.prior.digest,
        "parameter": stored.prior.parameter,
        "scale": stored.prior.scale,
        "components": [c.to_dict() for c in stored.prior.components],
        "ess": stored.result["ess"],
        "definition": stored.definition,
        "pooled": stored.result["pooled"],
        "notes": stored.result["notes"],
        "stale": list(stored.stale),
        "entries": entries,
        "caution": CAUTION,
    }
