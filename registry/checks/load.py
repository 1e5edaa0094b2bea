"""A stored prior as the checks read it: the prior, what its measure's studies report, the
warnings a user must see, and the definition's plausible range in a study's terms."""

from __future__ import annotations

import math
from dataclasses import dataclass

from registry.checks.study import Study
from registry.priors.store import StoredPrior, get_prior
from registry.storage.ledger import Ledger
from registry.values.measures import measure
from registry.values.scales import in_domain, to_analysis


@dataclass(frozen=True)
class Loaded:
    stored: StoredPrior
    warnings: tuple[str, ...]

    @property
    def measure(self) -> str:
        return self.stored.prior.measure


def load(ledger: Ledger, label: str) -> Loaded:
    """The stored prior and a warning for each reason it is stale (a newer revision of an
    entry, a retracted source) and for entries of retracted sources it includes on purpose."""
    stored = get_prior(ledger, label)
    warnings = [f"{stored.prior.label} is stale: {reason}" for reason in stored.stale]
    if stored.result.include_retracted:
        warnings.append(
            f"{stored.prior.label} includes entries of retracted sources, as its definition asks"
        )
    return Loaded(stored, tuple(warnings))


def plausible_range(stored: StoredPrior, study: Study) -> tuple[float, float] | None:
    """The definition's `[output] plausible` range (natural scale) as a range of the study's
    result: events between lo x size and hi x size for counts (the observed proportion or rate
    in the range), else the range on the measure's analysis scale (an end outside the scale's
    domain becomes infinite)."""
    bounds = stored.definition.get("output.plausible")
    if bounds is None:
        return None
    lo, hi = (float(b) for b in bounds)
    if study.observation.counts:
        return lo * study.size, hi * study.size
    scale = measure(stored.prior.measure).scale
    return (
        to_analysis(scale, lo) if in_domain(scale, lo) else -math.inf,
        to_analysis(scale, hi) if in_domain(scale, hi) else math.inf,
    )
