"""Robust mixtures and conjugate updates of mixture priors.

Robust mixture (Schmidli, Gsteiger, Roychoudhury, O'Hagan, Spiegelhalter & Neuenschwander
2014, Biometrics 70:1023): p(theta) = (1 - w) p_informative(theta) + w p_vague(theta). The
vague component carries a small, fixed amount of information that does not depend on the unit
in which exposure or the outcome was recorded (see `vague_component`).

Updating a mixture of conjugate components with data gives a mixture of the updated
components, with weights w_j' proportional to w_j m_j(data), m_j the marginal likelihood under
component j (common practice for conjugate mixtures; used by Schmidli et al. 2014). Weights
are computed in log space and normalised with log-sum-exp. Terms of m_j that are the same for
every component (binomial coefficients, y!) cancel and are left out.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable
from dataclasses import dataclass

from registry.errors import InputError
from registry.values.families import Beta, Family, Gamma, Normal, family
from registry.values.prior import Component, Prior


def _components(components: Iterable[Component]) -> tuple[Component, ...]:
    out = tuple(components)
    if not out:
        raise InputError("a prior needs at least one component", field="components")
    total = math.fsum(c.weight for c in out)
    if abs(total - 1.0) > 1e-9:
        raise InputError(f"component weights must sum to 1, got {total}", field="weight")
    return out


def with_vague_component(
    components: Iterable[Component], vague: Component, weight: float
) -> tuple[Component, ...]:
    """(1 - w) x informative mixture + w x vague (Schmidli et al. 2014).

    `weight` is the vague component's prior weight w in [0, 1); w = 0 returns the
    informative components unchanged. The vague component's own weight is ignored.
    """
    informative = _components(components)
    if not (math.isfinite(weight) and 0 <= weight < 1):
        raise InputError(f"the vague weight must be in [0, 1), got {weight}", field="weight")
    if vague.support != informative[0].support:
        raise InputError(
            f"the vague component ({vague.family}) must share the support of "
            f"the informative prior ({informative[0].family})",
            field="vague",
        )
    if weight == 0:
        return informative
    return (
        *(c.reweighted((1.0 - weight) * c.weight) for c in informative),
        vague.reweighted(weight),
    )


@dataclass(frozen=True)
class Vague:
    """The robust mixture's vague component and, in words, how much information it carries."""

    component: Component
    description: str


def _expit(x: float) -> float:
    return 1.0 / (1.0 + math.exp(-x))


# One unit of data on an analysis scale, by likelihood: the sd of a normal that carries it at
# the prior mean m, and its name. The units do not depend on how exposure or the outcome was
# recorded: one participant (binomial, Fisher information p(1-p) for logit p), one expected
# event (Poisson; the information about log lambda in exposure E is lambda E, so one expected
# event gives information 1), one observation of sd unit_sd (normal data).
_ONE_OBSERVATION = "one observation of the unit sd"
_ONE_UNIT: dict[str, tuple[Callable[[float, float | None], float], str]] = {
    "binomial": (lambda m, _sd: 1.0 / math.sqrt(_expit(m) * _expit(-m)), "one participant"),
    "poisson": (lambda _m, _sd: 1.0, "one expected event"),
    "normal": (lambda _m, sd: float(sd), _ONE_OBSERVATION),
}


def _beta_default(_mean: float) -> Vague:
    return Vague(
        Component.of(Beta(1.0, 1.0)),
        "uniform Beta(1, 1), worth 2 participants by variance matching (a + b = 2)",
    )


def _gamma_default(mean: float) -> Vague:
    return Vague(
        Component.of(Gamma(1.0, mean)),
        f"exponential with the prior's mean {mean:.4g} (gamma shape 1): the information of one "
        f"expected event, worth {1.0 / mean:.4g} units of exposure by variance matching",
    )


# Natural-scale conjugate families get a weakly informative default of their own; every other
# prior gets a normal worth one unit of data at its mean.
_NATURAL_DEFAULTS: dict[str, Callable[[float], Vague]] = {
    Beta.name: _beta_default,
    Gamma.name: _gamma_default,
}

VAGUE_FORMS = "auto, or FAMILY:P1,P2 with scipy-style parameters (e.g. beta:1,1)"


def vague_component(
    informative: Prior, spec: str = "auto", *, likelihood: str, unit_sd: float | None = None
) -> Vague:
    """The robust mixture's vague component for `informative`.

    "auto" (the default):
    - a beta prior (a probability): the uniform Beta(1, 1), a weakly informative shape with no
      spike at either end (common practice);
    - a gamma prior (a rate): the exponential Gamma(1, scale = m) with the prior's mean m, the
      information of one expected event (so multiplying every exposure by 1,000 and dividing
      the rate by 1,000 gives the same prior in the new unit);
    - a prior on an analysis scale: N(m, s_1^2), one unit of data at the prior mean m (see
      `_ONE_UNIT`; a unit-information prior in the sense of Kass & Wasserman 1995, JASA
      90:928, recalled from memory).
    Otherwise `spec` names a family and its parameters in scipy's order, e.g. "beta:1,1".
    """
    mean = informative.mean()
    if not math.isfinite(mean):
        raise InputError(
            "the informative prior has no finite mean, so the vague component cannot be "
            "centred on it; give discount.robust_component as FAMILY:PARAMS",
            field="discount.robust_component",
        )
    text = spec.strip()
    if text != "auto":
        dist = _parse_family(text)
        return Vague(Component.of(dist), f"{text}, as the definition gives it")
    natural = _NATURAL_DEFAULTS.get(informative.components[0].family)
    if natural is not None:
        return natural(mean)
    sd_of, unit = _ONE_UNIT[likelihood]
    if unit_sd is None and unit == _ONE_OBSERVATION:
        raise InputError(
            "the robust component on this scale is one observation of the unit sd; give "
            "output.unit_sd, or discount.robust_component as FAMILY:PARAMS",
            field="output.unit_sd",
        )
    sd = sd_of(mean, unit_sd)
    return Vague(
        Component.of(Normal(mean, sd)),
        f"normal({mean:.4g}, {sd:.4g}) at the prior's mean: {unit}",
    )


def _parse_family(text: str) -> Family:
    name, sep, rest = text.partition(":")
    cls = family(name.strip()) if sep else None
    if cls is None:
        raise InputError(f"use {VAGUE_FORMS}, got {text!r}", field="discount.robust_component")
    try:
        values = [float(v) for v in rest.split(",")]
    except ValueError:
        raise InputError(
            f"cannot read the numbers in {text!r}; use {VAGUE_FORMS}",
            field="discount.robust_component",
        ) from None
    names = cls.parameter_names()
    if len(values) != len(names):
        raise InputError(
            f"{cls.name} takes {', '.join(names)} (in that order), got {rest!r}",
            field="discount.robust_component",
        )
    return cls(**dict(zip(names, values, strict=True)))


# What each likelihood's data must be: (first, second) -> message or "".
_DATA_RULES: dict[str, Callable[[float, float], str]] = {
    "normal": lambda y, se: (
        "" if math.isfinite(y) and math.isfinite(se) and se > 0 else "a finite y and se > 0"
    ),
    "binomial": lambda x, n: "" if math.isfinite(n) and n > 0 and 0 <= x <= n else "0 <= x <= n",
    "poisson": lambda x, e: (
        "" if math.isfinite(e) and e > 0 and math.isfinite(x) and x >= 0 else "x >= 0, E > 0"
    ),
}


def update(components: Iterable[Component], first: float, second: float) -> tuple[Component, ...]:
    """The posterior mixture after one observation of the components' conjugate likelihood.

    (first, second) is (y, se) for normal components, (events, n) for beta and (events,
    exposure) for gamma; each component's `Family.update` gives its posterior and marginal.
    Non-integer counts (power-discounted data) are accepted.
    """
    comps = _components(components)
    likelihoods = {c.dist.conjugate for c in comps}
    if len(likelihoods) != 1 or None in likelihoods:
        raise InputError(
            "a closed-form update needs components of one conjugate family, got "
            + ", ".join(sorted({c.family for c in comps})),
            field="family",
        )
    (likelihood,) = likelihoods
    problem = _DATA_RULES[likelihood](first, second)
    if problem:
        raise InputError(
            f"{likelihood} data must have {problem}, got {first}, {second}", field="data"
        )
    updated = [c.dist.update(first, second) for c in comps]
    log_w = [math.log(c.weight) + lm for c, (_, lm) in zip(comps, updated, strict=True)]
    top = max(log_w)
    weights = [math.exp(v - top) for v in log_w]
    total = math.fsum(weights)
    # a component whose posterior weight underflows to zero carries no posterior mass
    kept = [(d, w / total) for (d, _), w in zip(updated, weights, strict=True) if w > 0]
    norm = math.fsum(w for _, w in kept)
    return tuple(Component.of(d, w / norm) for d, w in kept)
