"""What changed between two stored versions of a prior: definition settings, entries added,
removed and revised (with the revisions' reasons), ratings, discounts, and the prior's
summaries (mean, sd, 95% interval, effective sample size) before and after.

Changes are named key by key (`registry.priors.compare`), the way `verify` names them.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

from registry.priors.compare import Change, changes, rating_changes
from registry.storage.reads import Readable
from registry.storage.views import StoredPrior
from registry.values.ess_methods import ESS_METHODS


@dataclass(frozen=True)
class Summary:
    """A prior's summaries on its own scale: mean, sd, central 95% interval, ESS by method."""

    scale: str
    components: int
    mean: float
    sd: float
    interval_95: tuple[float, float]
    ess: dict[str, float | None]
    ess_unit: str

    @classmethod
    def of(cls, stored: StoredPrior) -> Summary:
        prior = stored.prior
        return cls(
            prior.scale,
            len(prior.components),
            prior.mean(),
            prior.var() ** 0.5,
            (prior.ppf(0.025), prior.ppf(0.975)),
            {m: prior.ess.get(m) for m in ESS_METHODS},
            str(prior.ess.get("unit", "")),
        )

    def to_dict(self) -> dict[str, Any]:
        return {**asdict(self), "interval_95": list(self.interval_95)}


@dataclass(frozen=True)
class Revised:
    """An entry both versions use, at different revisions, with the reasons in between."""

    id: int
    before: int
    after: int
    reasons: tuple[tuple[int, str], ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "revision_before": self.before,
            "revision_after": self.after,
            "reasons": [{"revision": n, "reason": r} for n, r in self.reasons],
        }


@dataclass(frozen=True)
class EntryChange:
    """A change in how both versions use one entry (a rating, a discount or the share)."""

    id: int
    change: Change

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, **self.change.to_dict()}


@dataclass(frozen=True)
class PriorDiff:
    before: str
    after: str
    digests: tuple[str, str]
    definition: tuple[Change, ...]
    added: tuple[tuple[int, int], ...]
    removed: tuple[tuple[int, int], ...]
    revised: tuple[Revised, ...]
    ratings: tuple[EntryChange, ...]
    discounts: tuple[EntryChange, ...]
    shares: tuple[EntryChange, ...]
    summaries: tuple[Summary, Summary]
    software: tuple[str, str]

    @property
    def identical(self) -> bool:
        """The same digest: the same definition, entry revisions and ratings."""
        return self.digests[0] == self.digests[1]

    def to_dict(self) -> dict[str, Any]:
        return {
            "before": self.before,
            "after": self.after,
            "identical": self.identical,
            "digest_before": self.digests[0],
            "digest_after": self.digests[1],
            "definition": [c.to_dict() for c in self.definition],
            "entries_added": [{"id": i, "revision": r} for i, r in self.added],
            "entries_removed": [{"id": i, "revision": r} for i, r in self.removed],
            "entries_revised": [r.to_dict() for r in self.revised],
            "ratings": [c.to_dict() for c in self.ratings],
            "discounts": [c.to_dict() for c in self.discounts],
            "weights": [c.to_dict() for c in self.shares],
            "summary_before": self.summaries[0].to_dict(),
            "summary_after": self.summaries[1].to_dict(),
            "software_before": self.software[0],
            "software_after": self.software[1],
        }


def diff_priors(reader: Readable, before: str, after: str) -> PriorDiff:
    """Compare two stored versions `NAME@A` and `NAME@B` (any two labels)."""
    a, b = reader.prior(before), reader.prior(after)
    uses_a = {u.id: u for u in a.uses}
    uses_b = {u.id: u for u in b.uses}
    common = sorted(set(uses_a) & set(uses_b))
    revised = []
    for i in common:
        ra, rb = uses_a[i].revision, uses_b[i].revision
        if ra != rb:
            history = reader.entry(i).revisions
            lo, hi = min(ra, rb), max(ra, rb)
            reasons = tuple((r.revision, r.reason) for r in history if lo < r.revision <= hi)
            revised.append(Revised(i, ra, rb, reasons))
    ratings, discounts, shares = [], [], []
    for i in common:
        ua, ub = uses_a[i], uses_b[i]
        ratings += [EntryChange(i, c) for c in rating_changes(ua.ratings, ub.ratings)]
        discounts += [EntryChange(i, c) for c in changes(ua.discount, ub.discount)]
        shares += [EntryChange(i, c) for c in changes({"weight": ua.share}, {"weight": ub.share})]
    return PriorDiff(
        before=a.prior.label,
        after=b.prior.label,
        digests=(a.prior.digest, b.prior.digest),
        definition=tuple(changes(a.definition, b.definition)),
        added=tuple((i, uses_b[i].revision) for i in sorted(set(uses_b) - set(uses_a))),
        removed=tuple((i, uses_a[i].revision) for i in sorted(set(uses_a) - set(uses_b))),
        revised=tuple(revised),
        ratings=tuple(ratings),
        discounts=tuple(discounts),
        shares=tuple(shares),
        summaries=(Summary.of(a), Summary.of(b)),
        software=(a.software_version, b.software_version),
    )
