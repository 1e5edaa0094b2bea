"""Built priors over the registry: select entries, build and store, list, verify and trace.

Persistence is `registry.storage.priors`; the computation is `registry.priors.build`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from registry.caution import CAUTION
from registry.errors import InputError
from registry.priors.build import Construction, construct, inputs_digest
from registry.priors.definition import Definition, definition_from_canonical
from registry.priors.selection import repeated_studies
from registry.storage.ledger import EntryView, Ledger
from registry.storage.priors import (
    StoredPrior,
    Use,
    latest_version,
    list_versions,
    load_version,
    save_version,
)
from registry.values.frozen import thaw

__all__ = [
    "StoredPrior",
    "build_prior",
    "get_prior",
    "list_priors",
    "select_entries",
    "trace_prior",
    "verify_prior",
]


def select_entries(ledger: Ledger, definition: Definition) -> list[EntryView]:
    """The current entries a definition selects; a study reported twice must be resolved.

    Entries from retracted sources are left out unless `select.include_retracted` is true.
    """
    retracted_too = definition["select.include_retracted"]
    chosen = ledger.entries(
        quantity=definition["select.quantity"],
        measure=definition["select.measure"],
        tags=definition["select.tags"],
        sources=definition["select.sources"],
        include_retracted=retracted_too,
    )
    excluded_tags = set(definition["select.exclude_tags"])
    excluded = set(definition["select.exclude"])
    chosen = [e for e in chosen if e.id not in excluded and not excluded_tags & set(e.tags)]
    known = {e.id for e in chosen}
    include = [i for i in definition["select.include"] if i not in known]
    if include:
        found = ledger.entries(ids=include, include_retracted=retracted_too)
        missing = sorted(set(include) - {e.id for e in found})
        if missing:
            raise InputError(
                f"no entry with id {missing[0]} (or it is from a retracted source)",
                field="select.include",
                path=definition.path,
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


def build_prior(ledger: Ledger, definition: Definition) -> StoredPrior:
    """Build `definition` on the registry's current entries and store it as a new version,
    unless the latest version has the same digest (then that version is returned, and
    nothing is computed: the digest is of the inputs alone)."""
    entries = select_entries(ledger, definition)
    latest = latest_version(ledger, definition.name)
    if latest is not None and latest.prior.digest == inputs_digest(definition, entries):
        return latest
    built = construct(definition, entries)
    uses = [
        Use(
            r.entry.id,
            r.entry.revision,
            r.share,
            tuple(x.to_dict() for x in r.ratings),
            r.discount.to_dict(),
        )
        for r in built.rated
    ]
    return save_version(
        ledger, definition.name, built.digest, definition.canonical(), built.result, uses
    )


def list_priors(ledger: Ledger) -> list[StoredPrior]:
    """Every stored version, newest version of each name last."""
    return list_versions(ledger)


def get_prior(ledger: Ledger, label: str) -> StoredPrior:
    """`NAME@N`, or the latest version of `NAME`."""
    return load_version(ledger, label)


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
    definition = definition_from_canonical(thaw(stored.definition))
    entries = ledger.revisions([(u.id, u.revision) for u in stored.uses])
    # the stored weight is tried first: a verified cap costs one build, not a solve
    rebuilt = construct(definition, entries, rebuild=True, solved_power=stored.result.global_power)
    differences = []
    digest_ok = rebuilt.digest == stored.prior.digest
    if not digest_ok:
        differences.append(
            f"digest {rebuilt.digest[:12]} rebuilt, {stored.prior.digest[:12]} stored"
        )
    want = [c.to_dict() for c in stored.result.components]
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
    views = ledger.revisions([(u.id, u.revision) for u in stored.uses])
    for use, view in zip(stored.uses, views, strict=True):
        entries.append(
            {
                **use.to_dict(),
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
        "ess": thaw(stored.result.ess),
        "definition": thaw(stored.definition),
        "pooled": thaw(stored.result.pooled),
        "notes": list(stored.result.notes),
        "stale": list(stored.stale),
        "entries": entries,
        "caution": CAUTION,
    }
