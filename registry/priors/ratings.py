"""Relevance ratings of an entry and the discount they imply.

Each selected entry is rated on six indirectness domains and on risk of bias. The domains
follow the GRADE guidance on indirectness (Guyatt et al. 2011, J Clin Epidemiol 64:1303),
which asks whether population, intervention, comparator and outcome differ from the
question; setting and study design are kept as separate domains here because a registry
mixes trials, cohorts and expert judgement. GRADE's levels are "not serious / serious /
very serious"; this module adds a "minor" level between direct and serious.

A `DiscountMapping` turns a rating into a discount by either or both published mechanisms:

- a power weight (Ibrahim & Chen 2000, Statistical Science 15:46): the entry's likelihood is
  raised to a in (0, 1]. For a normal likelihood N(y; theta, se^2) the power a multiplies
  the precision by a, so the discounted standard error is se / sqrt(a);
- an additive bias (Turner, Spiegelhalter, Smith & Thompson 2009, JRSS A 172:21): the entry
  estimates theta + b with b ~ N(shift, bias_var). Integrating b out gives
  y - shift ~ N(theta, se^2 + bias_var).

Sign convention for the shift: a positive shift means the entry is believed to overestimate
the quantity by that amount, so the adjusted estimate is y - shift.

With both mechanisms the power discounts the entry's own sampling information and the bias
variance is added afterwards: se_adj^2 = se^2 / a + bias_var. This order is our choice; it
keeps the bias variance, which is elicited on the analysis scale, from being rescaled by
the power.

This module is pure: it uses the standard library only.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from registry.errors import InputError

DOMAINS = (
    "population",
    "intervention",
    "comparator",
    "outcome",
    "setting",
    "design",
    "risk_of_bias",
)
INDIRECTNESS_LEVELS = ("direct", "minor", "serious", "very_serious")
BIAS_LEVELS = ("low", "some", "high")
MECHANISMS = ("power", "bias", "both")


def levels_for(domain: str) -> tuple[str, ...]:
    """The levels of a domain, best first."""
    if domain not in DOMAINS:
        raise InputError(
            f"unknown rating domain {domain!r}; one of {', '.join(DOMAINS)}", field="domain"
        )
    return BIAS_LEVELS if domain == "risk_of_bias" else INDIRECTNESS_LEVELS


@dataclass(frozen=True)
class Rating:
    """One judgement: an entry's level on one domain, why, and which rule set it.

    A rationale is required for every level below the best, so that a reviewer can read
    why information was discounted.
    """

    domain: str
    level: str
    rationale: str = ""
    rule: str = ""

    def __post_init__(self) -> None:
        levels = levels_for(self.domain)
        if self.level not in levels:
            raise InputError(
                f"{self.domain} level must be one of {', '.join(levels)}, got {self.level!r}",
                field=self.domain,
            )
        if self.level != levels[0] and not self.rationale.strip():
            raise InputError(
                f"a {self.domain} rating of {self.level!r} needs a written rationale",
                field=self.domain,
            )

    def to_dict(self) -> dict[str, str]:
        return {
            "domain": self.domain,
            "level": self.level,
            "rationale": self.rationale,
            "rule": self.rule,
        }


@dataclass(frozen=True)
class LevelDiscount:
    """What one level of one domain costs: a power factor, a bias variance and a shift.

    `bias_var` and `shift` are on the analysis scale of the quantity.
    """

    power: float = 1.0
    bias_var: float = 0.0
    shift: float = 0.0

    def to_dict(self) -> dict[str, float]:
        return {"power": self.power, "bias_var": self.bias_var, "shift": self.shift}


def _check_level(domain: str, level: str, d: LevelDiscount) -> None:
    if not (math.isfinite(d.power) and 0 < d.power <= 1):
        raise InputError(
            f"{domain} {level}: the power factor must be in (0, 1], got {d.power}", field=domain
        )
    if not (math.isfinite(d.bias_var) and d.bias_var >= 0):
        raise InputError(
            f"{domain} {level}: the bias variance must be finite and >= 0, got {d.bias_var}",
            field=domain,
        )
    if not math.isfinite(d.shift):
        raise InputError(
            f"{domain} {level}: the bias shift must be finite, got {d.shift}", field=domain
        )


@dataclass(frozen=True)
class DiscountMapping:
    """For every domain and level, the `LevelDiscount` it implies.

    Validation makes the discount monotone by construction: going down the levels of a
    domain, the power factor never rises and the bias variance never falls. So a worse
    rating can never narrow a prior or raise its effective sample size. Shifts carry a
    direction and are not ordered.
    """

    levels: Mapping[str, Mapping[str, LevelDiscount]]

    def __post_init__(self) -> None:
        unknown = set(self.levels) - set(DOMAINS)
        if unknown:
            raise InputError(
                f"unknown rating domain {sorted(unknown)[0]!r}; one of {', '.join(DOMAINS)}",
                field=sorted(unknown)[0],
            )
        canonical: dict[str, dict[str, LevelDiscount]] = {}
        for domain in DOMAINS:
            given = self.levels.get(domain)
            names = levels_for(domain)
            if given is None or set(given) != set(names):
                raise InputError(
                    f"the mapping for {domain} must give exactly the levels {', '.join(names)}",
                    field=domain,
                )
            previous: LevelDiscount | None = None
            for level in names:
                d = given[level]
                _check_level(domain, level, d)
                if previous is not None and (
                    d.power > previous.power or d.bias_var < previous.bias_var
                ):
                    raise InputError(
                        f"{domain}: level {level!r} must discount at least as much as the "
                        "level above it (power factor no larger, bias variance no smaller)",
                        field=domain,
                    )
                previous = d
            canonical[domain] = {level: given[level] for level in names}
        object.__setattr__(self, "levels", canonical)

    def get(self, domain: str, level: str) -> LevelDiscount:
        return self.levels[domain][level]

    def to_dict(self) -> dict[str, dict[str, dict[str, float]]]:
        return {
            domain: {level: d.to_dict() for level, d in by_level.items()}
            for domain, by_level in self.levels.items()
        }

    @classmethod
    def from_dict(
        cls, doc: Mapping[str, Any], base: DiscountMapping | None = None
    ) -> DiscountMapping:
        """A mapping from a definition file, over `base` (default `DEFAULT_MAPPING`).

        `doc` is {domain: {level: {"power": .., "bias_sd": .. or "bias_var": .., "shift":
        ..}}}; anything not given keeps the base value. The result is validated as a whole.
        """
        base = DEFAULT_MAPPING if base is None else base
        merged = {domain: dict(by_level) for domain, by_level in base.levels.items()}
        for domain, by_level in doc.items():
            if domain not in merged:
                raise InputError(
                    f"unknown rating domain {domain!r}; one of {', '.join(DOMAINS)}", field=domain
                )
            if not isinstance(by_level, Mapping):
                raise InputError(
                    f"{domain}: must be a table of levels, such as [discount.mapping.{domain}."
                    f"{levels_for(domain)[-1]}], got {by_level!r}",
                    field=domain,
                )
            for level, spec in by_level.items():
                if level not in merged[domain]:
                    raise InputError(
                        f"{domain} level must be one of "
                        f"{', '.join(levels_for(domain))}, got {level!r}",
                        field=domain,
                    )
                merged[domain][level] = _level_from_dict(domain, level, spec, merged[domain][level])
        return cls(merged)


def _level_from_dict(
    domain: str, level: str, spec: Mapping[str, Any], old: LevelDiscount
) -> LevelDiscount:
    if not isinstance(spec, Mapping):
        raise InputError(
            f"{domain} {level}: must be a table such as {{ power = 0.5, bias_sd = 0.2 }}, "
            f"got {spec!r}",
            field=domain,
        )
    unknown = set(spec) - {"power", "bias_sd", "bias_var", "shift"}
    if unknown:
        raise InputError(
            f"{domain} {level}: unknown key {sorted(unknown)[0]!r}; use power, "
            "bias_sd or bias_var, shift",
            field=domain,
        )
    if "bias_sd" in spec and "bias_var" in spec:
        raise InputError(f"{domain} {level}: give bias_sd or bias_var, not both", field=domain)
    try:
        bias_sd = float(spec["bias_sd"]) if "bias_sd" in spec else None
        bias_var = float(spec.get("bias_var", old.bias_var)) if bias_sd is None else None
        power = float(spec.get("power", old.power))
        shift = float(spec.get("shift", old.shift))
    except (TypeError, ValueError, OverflowError) as exc:
        raise InputError(
            f"{domain} {level}: every value must be a number ({exc})", field=domain
        ) from exc
    if bias_sd is not None:
        if bias_sd < 0:
            raise InputError(f"{domain} {level}: bias_sd must be >= 0, got {bias_sd}", field=domain)
        bias_var = bias_sd * bias_sd
    return LevelDiscount(power=power, bias_var=float(bias_var), shift=shift)


def _ladder(
    powers: tuple[float, ...], bias_sds: tuple[float, ...], names: tuple[str, ...]
) -> dict[str, LevelDiscount]:
    return {
        name: LevelDiscount(power=p, bias_var=sd * sd)
        for name, p, sd in zip(names, powers, bias_sds, strict=True)
    }


_INDIRECT = _ladder((1.0, 0.9, 0.6, 0.3), (0.0, 0.05, 0.15, 0.3), INDIRECTNESS_LEVELS)
_BIAS = _ladder((1.0, 0.8, 0.5), (0.0, 0.1, 0.25), BIAS_LEVELS)

DEFAULT_MAPPING = DiscountMapping(
    {domain: (_BIAS if domain == "risk_of_bias" else _INDIRECT) for domain in DOMAINS}
)
"""The shipped default: a convention chosen by priorledger, to be reviewed, not a fact.

Indirectness domains, per level direct / minor / serious / very_serious:
power factor 1 / 0.9 / 0.6 / 0.3 and bias sd 0 / 0.05 / 0.15 / 0.3.
Risk of bias, per level low / some / high: power factor 1 / 0.8 / 0.5 and bias sd
0 / 0.1 / 0.25. No shift anywhere (direction unknown by default).

These numbers are illustrative, moderate values we chose; no published source gives them.
The additive form comes from Turner et al. (2009), who elicited biases domain by domain;
their elicited magnitudes are for their case studies and are not reproduced here. The bias
sds are on the analysis scale and are sized for unitless scales (log ratios, logits,
Fisher's z, standardised mean differences); for a quantity on an identity scale in natural
units (a mean in mmHg, say) the bias variances must be set in those units.
"""


@dataclass(frozen=True)
class Discount:
    """The discount of one entry: a power weight, a bias shift and a bias variance."""

    power: float = 1.0
    bias_shift: float = 0.0
    bias_var: float = 0.0

    def __post_init__(self) -> None:
        _check_level(
            "discount", "combined", LevelDiscount(self.power, self.bias_var, self.bias_shift)
        )

    def to_dict(self) -> dict[str, float]:
        return {"power": self.power, "bias_shift": self.bias_shift, "bias_var": self.bias_var}


def discount_for(
    ratings: Iterable[Rating], mapping: DiscountMapping = DEFAULT_MAPPING, mechanism: str = "both"
) -> Discount:
    """Combine an entry's ratings into one discount.

    Every domain must be rated exactly once (an unrated domain is an error, not an
    assumption of directness). Power factors multiply across domains, bias variances add
    (independent biases, as in Turner et al. 2009) and shifts add. `mechanism` keeps the
    power part ("power"), the bias part ("bias") or both ("both").
    """
    if mechanism not in MECHANISMS:
        raise InputError(
            f"mechanism must be one of {', '.join(MECHANISMS)}, got {mechanism!r}",
            field="mechanism",
        )
    by_domain: dict[str, Rating] = {}
    for rating in ratings:
        if rating.domain in by_domain:
            raise InputError(f"{rating.domain} is rated more than once", field=rating.domain)
        by_domain[rating.domain] = rating
    for domain in DOMAINS:
        if domain not in by_domain:
            raise InputError(f"no rating for {domain}", field=domain)
    power, shift, bias_var = 1.0, 0.0, 0.0
    for domain in DOMAINS:
        d = mapping.get(domain, by_domain[domain].level)
        power *= d.power
        shift += d.shift
        bias_var += d.bias_var
    if mechanism == "power":
        return Discount(power=power)
    if mechanism == "bias":
        return Discount(bias_shift=shift, bias_var=bias_var)
    return Discount(power=power, bias_shift=shift, bias_var=bias_var)


def apply_normal(y: float, se: float, discount: Discount) -> tuple[float, float]:
    """The discounted estimate and standard error of a normal likelihood.

    y_adj = y - shift and se_adj = sqrt(se^2 / a + bias_var): the power a multiplies the
    likelihood's precision by a (Ibrahim & Chen 2000), the additive bias adds its variance
    to the within-study variance (Turner et al. 2009).
    """
    if not (math.isfinite(se) and se > 0):
        raise InputError(f"a standard error must be finite and positive, got {se}", field="se")
    if not math.isfinite(y):
        raise InputError(f"an estimate must be finite, got {y}", field="y")
    return y - discount.bias_shift, math.sqrt(se * se / discount.power + discount.bias_var)
