"""Built priors over the registry: select entries, build and store, list, verify and trace.

Persistence is `registry.storage.priors`; the computation is `registry.priors.build`.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import asdict, dataclass, field
from typing import TYPE_CHECKING, Any

from registry import __version__
from registry.caution import CAUTION
from registry.errors import InputError
from registry.priors.build import Construction, construct, idle_rules, inputs_digest
from registry.priors.compare import Change, changes, rating_changes
from registry.priors.definition import Definition, definition_from_canonical
from registry.priors.selection import repeated_studies
from registry.storage.reads import Readable
from registry.storage.views import EntryView, StoredPrior, Use
from registry.values.frozen import thaw

if TYPE_CHECKING:
    from registry.storage.ledger import Ledger

__all__ = [
    "LeftOut",
    "StoredPrior",
    "build_prior",
    "get_prior",
    "left_out",
    "list_priors",
    "select_entries",
    "selection",
    "trace_prior",
    "verify_prior",
]


@dataclass(frozen=True)
class LeftOut:
    """An entry the selection's filters match that a prior does not use, and why."""

    id: int
    revision: int
    source: str
    study: str
    reasons: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return {**asdict(self), "reasons": list(self.reasons)}


@dataclass(frozen=True)
class Selection:
    """The entries a definition selects, and those its filters match but it leaves out."""

    chosen: tuple[EntryView, ...]
    left_out: tuple[LeftOut, ...]


def _matching(reader: Readable, definition: Definition, include_retracted: bool) -> list[EntryView]:
    """The current entries the definition's filters (quantity, measure, tags, sources) match."""
    return reader.entries(
        quantity=definition["select.quantity"],
        measure=definition["select.measure"],
        tags=definition["select.tags"],
        sources=definition["select.sources"],
        include_retracted=include_retracted,
    )


def _why_left_out(entry: EntryView, definition: Definition) -> tuple[str, ...]:
    reasons = []
    if entry.id in definition["select.exclude"]:
        reasons.append(f"excluded by id (select.exclude lists {entry.id})")
    tags = sorted(set(definition["select.exclude_tags"]) & set(entry.tags))
    if tags:
        reasons.append(f"excluded by tag {', '.join(tags)} (select.exclude_tags)")
    keep = definition["select.studies"].get(entry.study)
    if keep is not None and keep != entry.id:
        reasons.append(
            f"another report of study {entry.study}; entry {keep} stands for it (select.studies)"
        )
    if entry.retracted and not definition["select.include_retracted"]:
        reasons.append(
            f"source {entry.source} is retracted"
            + (f": {entry.retraction_reason}" if entry.retraction_reason else "")
        )
    return tuple(reasons) or (
        "not in this version: the entry was added or changed after it was built",
    )


def left_out(reader: Readable, definition: Definition, used: Iterable[int]) -> list[LeftOut]:
    """The current entries the definition's filters (quantity, measure, tags, sources) match
    but that are not among `used`, each with the reasons the selection gives for leaving it
    out: excluded by id or tag, another report of the same study, a retracted source."""
    used = set(used)
    matched = _matching(reader, definition, include_retracted=True)
    return [
        LeftOut(e.id, e.revision, e.source, e.study, _why_left_out(e, definition))
        for e in matched
        if e.id not in used
    ]


def select_entries(reader: Readable, definition: Definition) -> list[EntryView]:
    """The current entries a definition selects; a study reported twice must be resolved.

    Entries from retracted sources are left out unless `select.include_retracted` is true.
    """
    retracted_too = definition["select.include_retracted"]
    chosen = _matching(reader, definition, retracted_too)
    excluded_tags = set(definition["select.exclude_tags"])
    excluded = set(definition["select.exclude"])
    chosen = [e for e in chosen if e.id not in excluded and not excluded_tags & set(e.tags)]
    known = {e.id for e in chosen}
    include = [i for i in definition["select.include"] if i not in known]
    if include:
        found = reader.entries(ids=include, include_retracted=retracted_too)
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


def selection(reader: Readable, definition: Definition) -> Selection:
    """What `select_entries` chooses, with every entry the filters match that it leaves out
    and why (excluded by id or tag, another report of the same study, a retracted source)."""
    chosen = select_entries(reader, definition)
    return Selection(tuple(chosen), tuple(left_out(reader, definition, [e.id for e in chosen])))


def build_prior(
    ledger: Ledger, definition: Definition, *, strict: bool = False, user: str | None = None
) -> StoredPrior:
    """Build `definition` on the registry's current entries and store it as a new version
    recorded under `user` (`registry.storage.db.who`), unless the latest version has the
    same digest (then that version is returned). `strict` makes a rule that matches no
    selected entry an error."""
    # storing loads SQLAlchemy, which the commands that only read a prior do without
    from registry.storage.priors import latest_version, save_version

    entries = select_entries(ledger, definition)
    idle_rules(definition, entries, strict=strict)  # checked even when nothing is rebuilt
    latest = latest_version(ledger, definition.name)
    if latest is not None and latest.prior.digest == inputs_digest(definition, entries):
        return latest  # nothing computed: the digest is of the inputs alone
    built = construct(definition, entries, strict=strict)
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
        ledger, definition.name, built.digest, definition.canonical(), built.result, uses, user=user
    )


def list_priors(reader: Readable) -> list[StoredPrior]:
    """Every stored version, newest version of each name last."""
    return reader.priors()


def get_prior(reader: Readable, label: str) -> StoredPrior:
    """`NAME@N`, or the latest version of `NAME`."""
    return reader.prior(label)


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
        return (
            self.digest_matches
            and self.components_match
            and not self.differences
            and not self.stale
        )

    def to_dict(self) -> dict[str, Any]:
        return {
            "prior": self.label,
            "ok": self.ok,
            "digest_matches": self.digest_matches,
            "components_match": self.components_match,
            "differences": list(self.differences),
            "stale": list(self.stale),
        }


def verify_prior(reader: Readable, label: str) -> Verification:
    """Rebuild from the stored definition and the exact entry revisions used; compare, and
    say in one line per difference which setting, entry revision or component changed."""
    stored = get_prior(reader, label)
    definition = definition_from_canonical(thaw(stored.definition))
    entries = reader.revisions([(u.id, u.revision) for u in stored.uses])
    # the stored weight is tried first: a verified cap costs one build, not a solve
    rebuilt = construct(definition, entries, rebuild=True, solved_power=stored.result.global_power)
    differences = [
        f"setting {c.text()} (stored -> as read now)"
        for c in changes(stored.definition, definition.canonical())
    ]
    for use, rated in zip(stored.uses, rebuilt.rated, strict=True):
        here = f"entry {use.id} revision {use.revision}:"
        found = [
            *rating_changes(use.ratings, [r.to_dict() for r in rated.ratings]),
            *(
                Change(f"discount {c.key}", c.before, c.after)
                for c in changes(use.discount, rated.discount.to_dict())
            ),
            *changes({"weight": use.share}, {"weight": rated.share}),
        ]
        differences += [f"{here} {c.text()} (stored -> rebuilt)" for c in found]
    want = [c.to_dict() for c in stored.result.components]
    got = [c.to_dict() for c in rebuilt.components]
    components_ok = want == got
    if len(want) != len(got):
        differences.append(f"components: {len(want)} stored -> {len(got)} rebuilt")
    for i, (a, b) in enumerate(zip(want, got, strict=False), start=1):
        differences += [f"component {i}: {c.text()} (stored -> rebuilt)" for c in changes(a, b)]
    digest_ok = rebuilt.digest == stored.prior.digest
    if not digest_ok:
        differences.append(
            f"digest {stored.prior.digest[:12]} stored -> {rebuilt.digest[:12]} rebuilt"
        )
    if differences and stored.software_version != __version__:
        differences.append(
            f"built by priorledger {stored.software_version}, rebuilt by {__version__}"
        )
    return Verification(
        stored.prior.label, digest_ok, components_ok, tuple(differences), stored.stale, rebuilt
    )


def trace_prior(reader: Readable, label: str) -> dict[str, Any]:
    """Prior -> definition -> each entry (revision, ratings, weight) -> source -> reported
    numbers -> conversion -> y, se: what a reviewer needs without opening the database; with
    every revision of each entry and its reason, and the entries the selection left out."""
    stored = get_prior(reader, label)
    entries = []
    for use in stored.uses:
        history = reader.entry(use.id).revisions
        view = next(r for r in history if r.revision == use.revision)
        entries.append(
            {
                **use.to_dict(),
                "revision_reason": view.reason,
                "revisions": [
                    {
                        "revision": r.revision,
                        "reason": r.reason,
                        "created_at": r.created_at,
                        "created_by": r.created_by,
                        "y": r.y,
                        "se": r.se,
                        "used": r.revision == use.revision,
                    }
                    for r in history
                ],
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
        "created_at": stored.created_at,
        "created_by": stored.created_by,
        "software_version": stored.software_version,
        "entries": entries,
        "left_out": [
            x.to_dict()
            for x in left_out(
                reader,
                definition_from_canonical(thaw(stored.definition)),
                [u.id for u in stored.uses],
            )
        ],
        "caution": CAUTION,
    }
