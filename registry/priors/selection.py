"""From selected registry entries to a pooled result.

Takes entry values (anything with `id`, `source`, `study`, `measure`, `scale`, `y`, `se`,
`reported`, `retracted`) and so needs no database. Selected entries must share one measure.
The exact count likelihoods need every entry's counts as reported (the measure table's count
form: `events, total` for a proportion, `events, exposure` for a rate).

Entries from retracted sources are never pooled unless the caller says so
(`include_retracted=True`); the result's notes then say which were included.
"""

from __future__ import annotations

import re
from collections import Counter
from collections.abc import Sequence
from typing import Any, Protocol

from registry.errors import InputError
from registry.priors.ratings import Discount, apply_normal
from registry.values.measures import Measure, measure

LIKELIHOODS = ("normal", "exact")

# The default prior on the between-study sd where the scale is unitless and its values have a
# shared meaning: half-normal with scale 0.5 on log ratios and logits, under which values of tau
# above 1 (a 2.7-fold spread of ratios between studies) have prior probability 0.05
# (Spiegelhalter, Abrams & Myles 2004, ch. 5, on weakly informative priors for tau on the log
# odds ratio scale; recalled from memory). On every other scale tau is in the outcome's own
# units and no default can be defended, so the user must give one.
DEFAULT_TAU_PRIOR = {"log": "half-normal:0.5", "logit": "half-normal:0.5"}
_UNIT_SD_MULTIPLE = re.compile(r"([0-9.eE+-]+)\s*\*\s*unit_sd")


class EntryLike(Protocol):
    id: int
    source: str
    study: str
    measure: str
    scale: str
    y: float
    se: float
    reported: dict[str, str]
    retracted: bool


def check_selection(entries: Sequence[EntryLike]) -> Measure:
    """The selection's one measure (its table row); refuses an empty or mixed selection."""
    if not entries:
        raise InputError("the selection matches no entries", field="selection")
    measures = sorted({e.measure for e in entries})
    if len(measures) > 1:
        raise InputError(
            f"the selection mixes measures ({', '.join(measures)}); select one with --measure",
            field="measure",
        )
    return measure(measures[0])


def without_retracted(
    entries: Sequence[EntryLike], include_retracted: bool = False
) -> tuple[list[EntryLike], list[EntryLike]]:
    """(entries to use, entries from retracted sources left out)."""
    if include_retracted:
        return list(entries), []
    return [e for e in entries if not e.retracted], [e for e in entries if e.retracted]


def repeated_studies(entries: Sequence[EntryLike]) -> dict[str, list[int]]:
    """Studies that more than one selected entry reports, with those entries' ids."""
    counts = Counter(e.study for e in entries)
    return {s: [e.id for e in entries if e.study == s] for s, n in counts.items() if n > 1}


def counts_of(entries: Sequence[EntryLike], row: Measure) -> tuple[str, list[float], list[float]]:
    """The count likelihood's name and each entry's (events, total or exposure)."""
    form = row.count
    if form is None:
        raise InputError(
            f"--likelihood exact needs counts of a proportion or a rate, not a "
            f"{row.name}; use --likelihood normal",
            field="likelihood",
        )
    events, sizes = [], []
    for e in entries:
        if form.events not in e.reported or form.size not in e.reported:
            raise InputError(
                f"entry {e.id} ({e.source}) is reported as {', '.join(e.reported)}, not as "
                f"{form.events}, {form.size}; exclude it or use --likelihood normal",
                field="likelihood",
            )
        events.append(float(e.reported[form.events]))
        sizes.append(float(e.reported[form.size]))
    return form.likelihood, events, sizes


def resolve_tau_prior(text: str | None, scale: str, unit_sd: float | None = None) -> str:
    """The tau prior to use: `text` (with `K*unit_sd` replaced by its value), or the scale's
    default; on a scale without a default, an error saying what to give."""
    if text is None:
        if scale in DEFAULT_TAU_PRIOR:
            return DEFAULT_TAU_PRIOR[scale]
        raise InputError(
            f"on the {scale} scale tau is in the outcome's own units, so there is no default "
            "tau prior: give one in those units (e.g. half-normal:5) or as a multiple of "
            "the unit sd (e.g. half-normal:0.5*unit_sd with output.unit_sd)",
            field="tau_prior",
        )
    if "unit_sd" not in text:
        return text
    if unit_sd is None:
        raise InputError(
            f"tau prior {text!r} is a multiple of unit_sd, which is not given; "
            "set output.unit_sd (or --unit-sd)",
            field="tau_prior",
        )
    return _UNIT_SD_MULTIPLE.sub(lambda m: f"{float(m.group(1)) * unit_sd:.17g}", text)


def pool_entries(
    entries: Sequence[EntryLike],
    *,
    method: str = "reml",
    likelihood: str = "normal",
    tau_prior: str | None = None,
    mu_prior: str = "flat",
    hksj: bool = False,
    discounts: Sequence[Discount] | None = None,
    unit_sd: float | None = None,
    include_retracted: bool = False,
) -> Any:
    """Pool the entries by `method` (common, dl, pm, reml, ml or bayes).

    The frequentist methods use each entry's y and se, discounted by the normal closed forms
    (`apply_normal`); `bayes` fits the hierarchical model by quadrature, with the exact count
    likelihood when `likelihood` is "exact", and passes the discounts into the likelihood.
    Entries from retracted sources are refused unless `include_retracted` is True.
    """
    from registry.synthesis import fit_counts, fit_normal, frequentist

    row = check_selection(entries)
    retracted = [e.id for e in entries if e.retracted]
    if retracted and not include_retracted:
        raise InputError(
            f"entries {retracted} come from retracted sources; leave them out or say "
            "include_retracted",
            field="selection",
        )
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
    tau_prior = resolve_tau_prior(tau_prior, row.scale, unit_sd)
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
    if likelihood == "exact":
        kind, events, sizes = counts_of(entries, row)
        return fit_counts(kind, events, sizes, tau_prior, mu_prior, **options)
    return fit_normal(
        [e.y for e in entries],
        [e.se for e in entries],
        tau_prior,
        mu_prior,
        scale=row.scale,
        **options,
    )
