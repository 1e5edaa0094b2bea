"""From selected registry entries to a pooled result.

Takes entry values (anything with `id`, `source`, `study`, `measure`, `scale`, `y`, `se`,
`reported`) and so needs no database. Selected entries must share one measure. The exact
count likelihoods need every entry's counts as reported: `events, total` for a proportion
(binomial-logit), `events, exposure` for a rate (Poisson-log).
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from typing import Any, Protocol

from registry.errors import InputError
from registry.priors.ratings import Discount, apply_normal

LIKELIHOODS = ("normal", "exact")
# measure -> (likelihood name, count fields as reported)
COUNT_FORMS = {
    "proportion": ("binomial", ("events", "total")),
    "rate": ("poisson", ("events", "exposure")),
}


class EntryLike(Protocol):
    id: int
    source: str
    study: str
    measure: str
    scale: str
    y: float
    se: float
    reported: dict[str, str]


def check_selection(entries: Sequence[EntryLike]) -> tuple[str, str]:
    """The selection's one measure and scale; refuses an empty or mixed selection."""
    if not entries:
        raise InputError("the selection matches no entries", field="selection")
    measures = sorted({e.measure for e in entries})
    if len(measures) > 1:
        raise InputError(
            f"the selection mixes measures ({', '.join(measures)}); select one with --measure",
            field="measure",
        )
    return measures[0], entries[0].scale


def repeated_studies(entries: Sequence[EntryLike]) -> dict[str, list[int]]:
    """Studies that more than one selected entry reports, with those entries' ids."""
    counts = Counter(e.study for e in entries)
    return {s: [e.id for e in entries if e.study == s] for s, n in counts.items() if n > 1}


def counts_of(entries: Sequence[EntryLike], measure: str) -> tuple[str, list[float], list[float]]:
    """The count likelihood's name and each entry's (events, total or exposure)."""
    if measure not in COUNT_FORMS:
        raise InputError(
            f"--likelihood exact needs counts of a proportion or a rate, not a "
            f"{measure}; use --likelihood normal",
            field="likelihood",
        )
    kind, fields = COUNT_FORMS[measure]
    events, sizes = [], []
    for e in entries:
        if not all(f in e.reported for f in fields):
            given = ", ".join(e.reported)
            raise InputError(
                f"entry {e.id} ({e.source}) is reported as {given}, not as "
                f"{', '.join(fields)}; exclude it or use --likelihood normal",
                field="likelihood",
            )
        events.append(float(e.reported[fields[0]]))
        sizes.append(float(e.reported[fields[1]]))
    return kind, events, sizes


def pool_entries(
    entries: Sequence[EntryLike],
    *,
    method: str = "reml",
    likelihood: str = "normal",
    tau_prior: str = "half-normal:0.5",
    mu_prior: str = "flat",
    hksj: bool = False,
    discounts: Sequence[Discount] | None = None,
) -> Any:
    """Pool the entries by `method` (common, dl, pm, reml, ml or bayes).

    The frequentist methods use each entry's y and se, discounted by the normal closed forms
    (`apply_normal`); `bayes` fits the hierarchical model by quadrature, with the exact count
    likelihood when `likelihood` is "exact", and passes the discounts into the likelihood.
    """
    from registry.synthesis import fit_counts, fit_normal, frequentist

    measure, scale = check_selection(entries)
    if likelihood not in LIKELIHOODS:
        raise InputError(
            f"must be one of {', '.join(LIKELIHOODS)}, got {likelihood!r}", field="likelihood"
        )
    discounts = list(discounts or [Discount()] * len(entries))
    if method != "bayes":
        if likelihood == "exact":
            raise InputError("the exact count likelihood needs --method bayes", field="likelihood")
        adjusted = [apply_normal(e.y, e.se, d) for e, d in zip(entries, discounts, strict=True)]
        return frequentist.pool(
            [a[0] for a in adjusted], [a[1] for a in adjusted], method, hksj=hksj
        )
    if hksj:
        raise InputError("--hksj applies to the frequentist methods, not bayes", field="hksj")
    # Only the kinds of discount in use reach the fit, so its notes name only those.
    options = {
        "power": [d.power for d in discounts] if any(d.power != 1 for d in discounts) else None,
        "bias_shift": (
            [d.bias_shift for d in discounts] if any(d.bias_shift for d in discounts) else None
        ),
        "bias_var": (
            [d.bias_var for d in discounts] if any(d.bias_var for d in discounts) else None
        ),
    }
    y = [e.y for e in entries]
    se = [e.se for e in entries]
    if likelihood == "exact":
        kind, events, sizes = counts_of(entries, measure)
        return fit_counts(kind, events, sizes, tau_prior, mu_prior, **options)
    return fit_normal(y, se, tau_prior, mu_prior, scale=scale, **options)
