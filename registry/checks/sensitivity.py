"""How the posterior moves with the discount: the prior rebuilt (never stored) at each value
of the global power weight (Ibrahim & Chen 2000) or of the robust component's weight
(Schmidli et al. 2014), its effective sample size, the posterior after the new data, and the
tipping point where a posterior probability crosses a decision threshold.

Every other setting stays at the stored prior's. Over the power weight an ESS cap is not
re-solved (the cap would undo the value swept); over the robust weight the global power weight
stays as stored, so pooling and the mixture fit are done once and only the vague component's
weight changes. A robust weight of 1 (a definition allows at most 0.99) is the limit of
(1 - w) informative + w vague as w -> 1: the vague component alone.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from functools import cache
from typing import Any

from registry.checks.posterior import Posterior, posterior
from registry.checks.study import Study
from registry.errors import InputError
from registry.values.prior import Component, Prior

OVER = ("power", "robust_weight")
DEFAULT_VALUES = {
    "power": (0.05, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 1.0),
    "robust_weight": (0.0, 0.1, 0.2, 0.3, 0.5, 0.7, 0.9, 1.0),
}
TOLERANCE = 1e-3


@dataclass(frozen=True)
class Row:
    value: float
    ess: float | None
    ess_note: str | None
    posterior: Posterior = field(repr=False)
    probability: float | None

    def to_dict(self) -> dict[str, Any]:
        doc = {
            "value": self.value,
            "ess": self.ess,
            "posterior": self.posterior.summary.to_dict(),
            "weights": list(self.posterior.weights),
        }
        if self.ess is None:
            doc["ess_note"] = self.ess_note
        if self.probability is not None:
            doc["probability"] = self.probability
        return doc


@dataclass(frozen=True)
class Event:
    """theta above or below a threshold, on the prior's scale."""

    above: bool
    threshold: float

    def probability(self, post: Posterior) -> float:
        p = post.probability_above(self.threshold)
        return p if self.above else 1.0 - p

    def to_dict(self) -> dict[str, Any]:
        return {"above" if self.above else "below": self.threshold}


@dataclass(frozen=True)
class Sensitivity:
    prior: str
    over: str
    study: Study
    rows: tuple[Row, ...]
    event: Event | None
    decide: float | None
    tipping_point: float | None
    tipping_note: str | None
    tolerance: float
    ess_method: str
    ess_unit: str
    warnings: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        from registry.caution import CAUTION

        return {
            "prior": self.prior,
            "over": self.over,
            "data": self.study.to_dict(),
            "ess_method": self.ess_method,
            "ess_unit": self.ess_unit,
            "event": None if self.event is None else self.event.to_dict(),
            "decide": self.decide,
            "rows": [r.to_dict() for r in self.rows],
            "tipping_point": self.tipping_point,
            "tipping_note": self.tipping_note,
            "tolerance": self.tolerance,
            "nothing_stored": True,
            "warnings": list(self.warnings),
            "caution": CAUTION,
        }


@dataclass(frozen=True)
class Rebuilt:
    components: tuple[Component, ...]
    ess: float | None
    ess_note: str | None


def _power_rebuilder(ledger: Any, stored: Any) -> Callable[[float], Rebuilt]:
    """The prior rebuilt at global power weight v, cached by v."""
    from registry.priors.build import construct
    from registry.priors.definition import Definition, definition_from_canonical
    from registry.values.frozen import thaw

    definition = definition_from_canonical(thaw(stored.definition))
    entries = [ledger.revision(u.id, u.revision) for u in stored.uses]

    @cache
    def at(value: float) -> Rebuilt:
        values = {
            **definition.values,
            "discount.global_power": value,
            "discount.ess_cap": None,
        }
        result = construct(Definition(values, definition.path), entries, rebuild=True).result
        ess = result.ess
        return Rebuilt(result.components, ess["value"], ess.get("notes", {}).get(ess["method"]))

    return at


def _robust_rebuilder(stored: Any) -> Callable[[float], Rebuilt]:
    """The stored informative components with the vague component at weight v."""
    from registry.priors.build import ESS_METHOD, unit_model
    from registry.priors.definition import definition_from_canonical
    from registry.priors.ess import ess_all
    from registry.priors.update import vague_component, with_vague_component
    from registry.values.frozen import thaw
    from registry.values.measures import measure

    result = stored.result
    definition = definition_from_canonical(thaw(stored.definition))
    model = unit_model(measure(result.measure), result.scale, definition)
    if result.robust is not None:
        keep = 1.0 - result.robust["weight"]
        informative = tuple(c.reweighted(c.weight / keep) for c in result.components[:-1])
        vague = Component.from_dict(result.robust["component"])
    else:
        informative = result.components
        vague = vague_component(
            Prior.candidate(result.scale, informative),
            definition["discount.robust_component"],
            likelihood=model.likelihood,
            unit_sd=model.unit_sd,
        ).component
    total = math.fsum(c.weight for c in informative)
    informative = tuple(c.reweighted(c.weight / total) for c in informative)

    @cache
    def at(value: float) -> Rebuilt:
        components = (
            (vague.reweighted(1.0),)
            if value == 1.0
            else with_vague_component(informative, vague, value)
        )
        ess = ess_all(
            Prior.candidate(result.scale, components),
            unit_sd=model.unit_sd,
            unit=model.unit,
            likelihood=model.likelihood,
        )
        return Rebuilt(components, ess[ESS_METHOD], ess.get("notes", {}).get(ESS_METHOD))

    return at


def _check_values(over: str, values: Sequence[float]) -> tuple[float, ...]:
    lo_open = over == "power"
    for v in values:
        if not (math.isfinite(v) and (v > 0 if lo_open else v >= 0) and v <= 1):
            raise InputError(
                f"each value must be in {'(0, 1]' if lo_open else '[0, 1]'}, got {v:g}",
                field="--values",
            )
    if not values:
        raise InputError("give at least one value", field="--values")
    return tuple(sorted(set(values)))


def _tipping(
    probability: Callable[[float], float],
    rows: Sequence[Row],
    decide: float,
    tolerance: float,
) -> tuple[float | None, str | None]:
    """The first value between two rows where probability - decide changes sign, by bisection
    to `tolerance` (of the value)."""
    for left, right in itertools.pairwise(rows):
        fl, fr = left.probability - decide, right.probability - decide
        if fl == 0:
            return left.value, None
        if fl * fr < 0:
            lo, hi = left.value, right.value
            while hi - lo > tolerance:
                mid = (lo + hi) / 2
                if (probability(mid) - decide) * fl > 0:
                    lo = mid
                else:
                    hi = mid
            return (lo + hi) / 2, None
    if rows[-1].probability == decide:
        return rows[-1].value, None
    return None, (
        f"the probability does not cross {decide:g} between {rows[0].value:g} and "
        f"{rows[-1].value:g}"
    )


def sensitivity(
    ledger: Any,
    label: str,
    *,
    over: str,
    values: Sequence[float] | None = None,
    events: float | None = None,
    n: float | None = None,
    exposure: float | None = None,
    estimate: float | None = None,
    se: float | None = None,
    above: float | None = None,
    below: float | None = None,
    decide: float | None = None,
    tolerance: float = TOLERANCE,
) -> Sensitivity:
    """Rows of (value, ESS, posterior summaries, probability) over `over`, and the tipping
    point (see the module docstring). Nothing is written to the registry."""
    from registry.checks.load import load
    from registry.checks.study import observed
    from registry.priors.build import ESS_METHOD

    if over not in OVER:
        raise InputError(f"must be one of {', '.join(OVER)}, got {over!r}", field="--over")
    if above is not None and below is not None:
        raise InputError(
            "give one of --probability-above, --probability-below", field="--probability-below"
        )
    event = (
        Event(above is not None, above if above is not None else below)
        if (above is not None or below is not None)
        else None
    )
    if decide is not None and event is None:
        raise InputError(
            "--decide needs --probability-above or --probability-below", field="--decide"
        )
    if decide is not None and not 0 < decide < 1:
        raise InputError(f"must be in (0, 1), got {decide:g}", field="--decide")
    if not (math.isfinite(tolerance) and tolerance > 0):
        raise InputError(f"must be greater than 0, got {tolerance:g}", field="--tolerance")
    chosen = _check_values(over, values if values is not None else DEFAULT_VALUES[over])
    loaded = load(ledger, label)
    stored = loaded.stored
    study = observed(
        loaded.measure, events=events, n=n, exposure=exposure, estimate=estimate, se=se
    )
    rebuild = _power_rebuilder(ledger, stored) if over == "power" else _robust_rebuilder(stored)

    def post_at(value: float) -> Posterior:
        return posterior(Prior.candidate(stored.prior.scale, rebuild(value).components), study)

    rows = []
    for v in chosen:
        built = rebuild(v)
        post = post_at(v)
        rows.append(
            Row(
                v,
                built.ess,
                built.ess_note,
                post,
                None if event is None else event.probability(post),
            )
        )
    tipping, note = (None, "no --decide threshold given")
    if decide is not None:
        tipping, note = _tipping(lambda v: event.probability(post_at(v)), rows, decide, tolerance)
    return Sensitivity(
        stored.prior.label,
        over,
        study,
        tuple(rows),
        event,
        decide,
        tipping,
        note,
        tolerance,
        ESS_METHOD,
        str(stored.prior.ess.get("unit", "")),
        loaded.warnings,
    )
