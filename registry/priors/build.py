"""Building a prior from a definition and the registry, and rebuilding it to verify.

`construct` is the pure computation (entries and a definition in, a prior's components,
ratings, discounts, shares and digest out); `build` selects the entries, constructs and
stores an immutable version; `verify` reconstructs from exactly what was stored.

Steps, each with its published source:
1. ratings per entry (rules, then per-entry overrides; risk of bias from the sheet);
2. discounts from ratings: a power weight (Ibrahim & Chen 2000) and an additive bias
   (Turner et al. 2009), times a global power weight;
3. pooling (registry.synthesis); the target is the predictive distribution of a new study's
   parameter (Neuenschwander et al. 2010) or the mean effect;
4. the output family fitted to the target (a mixture by EM, or moment matching);
5. a robust vague component (Schmidli et al. 2014), by default worth one unit of data;
6. effective sample size (Morita, Thall & Müller 2008; Neuenschwander et al. 2020), with an
   optional cap met by solving for the global power weight.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

from registry.errors import InputError
from registry.priors.definition import Definition
from registry.priors.ratings import DOMAINS, Discount, Rating, discount_for, levels_for
from registry.priors.selection import EntryLike, pool_entries
from registry.priors.value import Component, Prior

DIGEST_FORMAT = 1
# measure -> (default sd of one unit's observation on the analysis scale, its unit, source)
DEFAULT_UNIT_SD = {
    "rate_ratio": (
        2.0,
        "events",
        "var(log ratio) ≈ 4/events (Spiegelhalter, Abrams & Myles 2004, recalled from memory)",
    ),
    "hazard_ratio": (
        2.0,
        "events",
        "var(log hazard ratio) ≈ 4/events (Spiegelhalter, Abrams "
        "& Myles 2004, recalled from memory)",
    ),
    "smd": (2.0, "participants", "var(d) ≈ 4/N for two equal arms (Borenstein et al. 2009)"),
}
COUNT_LIKELIHOOD = {"proportion": "binomial", "rate": "poisson"}
NATURAL_FAMILY = {"proportion": ("beta", "probability"), "rate": ("gamma", "rate")}


@dataclass(frozen=True)
class Rated:
    """One entry as used in a prior: its ratings, discount and share of the information."""

    entry: Any
    ratings: tuple[Rating, ...]
    discount: Discount
    share: float

    def to_dict(self) -> dict[str, Any]:
        return {
            "id": self.entry.id,
            "revision": self.entry.revision,
            "weight": self.share,
            "ratings": [r.to_dict() for r in self.ratings],
            "discount": self.discount.to_dict(),
        }


@dataclass(frozen=True)
class Construction:
    """Everything a build computes; `result` is what the registry stores."""

    digest: str
    scale: str
    components: tuple[Component, ...]
    rated: tuple[Rated, ...]
    result: dict[str, Any] = field(repr=False)


def _matches(where: dict[str, Any], entry: Any) -> bool:
    for key, wanted in where.items():
        if key == "tags":
            if not set(wanted if isinstance(wanted, list) else [wanted]) <= set(entry.tags):
                return False
            continue
        value = (
            getattr(entry, key, None)
            if key in ("source", "study", "measure")
            else entry.context.get(key)
        )
        options = wanted if isinstance(wanted, list) else [wanted]
        if value is None or str(value).lower() not in {str(o).lower() for o in options}:
            return False
    return True


def rate_entry(entry: Any, definition: Definition) -> tuple[Rating, ...]:
    """The entry's rating on every domain, each saying which rule set it."""
    ratings = {d: Rating(d, levels_for(d)[0], "", "default (no rule applies)") for d in DOMAINS}
    extracted = entry.context.get("risk_of_bias")
    if extracted:
        who = entry.context.get("extracted_by")
        ratings["risk_of_bias"] = Rating(
            "risk_of_bias",
            extracted,
            f"rated {extracted!r} at extraction" + (f" by {who}" if who else ""),
            "extraction sheet: risk_of_bias",
        )
    for rule in definition["rule"]:
        if _matches(rule["where"], entry):
            for domain in DOMAINS:
                if domain in rule:
                    ratings[domain] = Rating(
                        domain,
                        rule[domain]["level"],
                        rule[domain].get("why", ""),
                        f"rule: {rule['name']}",
                    )
    for domain, given in definition["override"].get(str(entry.id), {}).items():
        ratings[domain] = Rating(
            domain, given["level"], given.get("why", ""), f"override for entry {entry.id}"
        )
    return tuple(ratings[d] for d in DOMAINS)


def _discounts(
    ratings: Sequence[tuple[Rating, ...]], definition: Definition, global_power: float
) -> list[Discount]:
    mechanism = definition["discount.mechanism"]
    mapping = definition.mapping()
    out = []
    for entry_ratings in ratings:
        d = Discount() if mechanism == "none" else discount_for(entry_ratings, mapping, mechanism)
        out.append(Discount(d.power * global_power, d.bias_shift, d.bias_var))
    return out


def _grid(pooled: Any, definition: Definition, k: int) -> tuple[Any, Any, Component | None]:
    """The target on the analysis scale as a density on a grid, and its closed form if any."""
    import numpy as np

    target = definition["target"]
    if pooled.method == "bayes" and target == "predictive":
        return np.asarray(pooled.predictive.x), np.asarray(pooled.predictive.density), None
    if target == "mean":
        closed = Component("normal", {"loc": pooled.mu, "scale": pooled.se})
    elif pooled.prediction is None:
        raise InputError(
            "a predictive target from a frequentist method needs a between-study "
            'variance and k >= 3; use method = "bayes" or target = "mean"',
            field="target",
        )
    else:
        # Higgins, Thompson & Spiegelhalter (2009): theta_new ~ mu + sqrt(tau² + se²) t_{k-2}
        closed = Component(
            "student_t",
            {"df": float(k - 2), "loc": pooled.mu, "scale": math.sqrt(pooled.tau2 + pooled.se**2)},
        )
    dist = closed.dist.frozen()
    x = np.linspace(dist.ppf(1e-6), dist.ppf(1 - 1e-6), 2001)
    return x, dist.pdf(x), closed


def _moments(x: Any, density: Any) -> tuple[float, float]:
    import numpy as np

    w = density / np.trapezoid(density, x)
    mean = float(np.trapezoid(w * x, x))
    return mean, float(math.sqrt(np.trapezoid(w * (x - mean) ** 2, x)))


def _fit_family(
    x: Any, density: Any, closed: Component | None, family: str, measure: str, scale: str
) -> tuple[tuple[Component, ...], str, dict[str, Any]]:
    """Components of the output family and the scale they live on, with the fit's error."""
    from registry.synthesis.mixture import fit_mixture

    if family == "auto":
        family = NATURAL_FAMILY.get(measure, ("mixture",))[0] if closed is None else "closed"
    if family == "closed" or (
        family == "student_t" and closed is not None and closed.family == "student_t"
    ):
        return (closed,), scale, {"method": "closed form"}
    if family == "student_t":
        raise InputError(
            "a Student-t prior comes from a frequentist predictive target; use "
            'family = "normal" or "mixture" here',
            field="output.family",
        )
    if family == "normal" or (
        family == "mixture" and closed is not None and closed.family == "normal"
    ):
        mean, sd = _moments(x, density)
        return (
            (Component("normal", {"loc": mean, "scale": sd}),),
            scale,
            {"method": "moment matching"},
        )
    if family == "lognormal":
        if scale != "log":
            raise InputError(
                "a log-normal prior needs a quantity on the log scale", field="output.family"
            )
        mean, sd = _moments(x, density)
        natural = "rate" if measure == "rate" else "ratio"
        return (
            (Component("lognormal", {"s": sd, "scale": math.exp(mean)}),),
            natural,
            {"method": "moment matching on the log scale"},
        )
    if family in ("beta", "gamma"):
        wanted = NATURAL_FAMILY.get(measure)
        if wanted is None or wanted[0] != family:
            raise InputError(
                f"a {family} prior needs a "
                f"{'proportion' if family == 'beta' else 'rate'}, not a {measure}",
                field="output.family",
            )
        # The fit takes the density on the analysis scale (logit or log) itself.
        fit = fit_mixture(x, density, family)
        return (
            tuple(fit.components),
            wanted[1],
            {"method": "EM mixture fit", "components": fit.n_components, **fit.error},
        )
    fit = fit_mixture(x, density, "normal")
    return (
        tuple(fit.components),
        scale,
        {"method": "EM mixture fit", "components": fit.n_components, **fit.error},
    )


def data_model(measure: str, scale: str, definition: Definition) -> dict[str, Any]:
    """One unit of data for the effective sample size and the vague component."""
    if scale in ("probability", "logit") or (measure in COUNT_LIKELIHOOD and scale != "identity"):
        likelihood = COUNT_LIKELIHOOD.get(measure, "binomial")
        unit = definition["output.ess_unit"] or (
            "participants" if likelihood == "binomial" else "units of exposure"
        )
        return {
            "likelihood": likelihood,
            "unit_sd": None,
            "unit": unit,
            "source": "Fisher information of one observation",
        }
    unit_sd = definition["output.unit_sd"]
    unit = definition["output.ess_unit"]
    source = "output.unit_sd of the definition"
    if unit_sd is None:
        if scale == "fisher_z":
            unit_sd, default_unit, source = 1.0, "participants", "var(z) = 1/(n - 3)"
        elif measure in DEFAULT_UNIT_SD:
            unit_sd, default_unit, source = DEFAULT_UNIT_SD[measure]
        else:
            raise InputError(
                f"the effective sample size of a {measure} prior needs "
                "output.unit_sd (the sd of one unit's observation)",
                field="output.unit_sd",
            )
        unit = unit or default_unit
    return {
        "likelihood": "normal",
        "unit_sd": unit_sd,
        "unit": unit or "participants",
        "source": source,
    }


def _digest(
    definition: Definition, entries: Sequence[Any], ratings: Sequence[tuple[Rating, ...]]
) -> str:
    """SHA-256 over the canonical definition, each entry revision's content and ratings."""
    doc = {
        "format": DIGEST_FORMAT,
        "definition": definition.canonical(),
        "entries": [
            {
                "id": e.id,
                "revision": e.revision,
                "measure": e.measure,
                "scale": e.scale,
                "y": repr(e.y),
                "se": repr(e.se),
                "reported": e.reported,
                "study": e.study,
                "context": e.context,
                "tags": list(e.tags),
                "ratings": [r.to_dict() for r in rs],
            }
            for e, rs in zip(entries, ratings, strict=True)
        ],
    }
    return hashlib.sha256(json.dumps(doc, sort_keys=True, ensure_ascii=True).encode()).hexdigest()


def _at_power(
    definition: Definition,
    entries: Sequence[EntryLike],
    ratings: Sequence[tuple[Rating, ...]],
    global_power: float,
    measure: str,
) -> dict[str, Any]:
    """One pass of steps 2-6 at a given global power weight."""
    from registry.priors.ess import ess_all
    from registry.priors.update import unit_information_component, with_vague_component

    discounts = _discounts(ratings, definition, global_power)
    pooled = pool_entries(
        entries,
        method=definition["pool.method"],
        likelihood=definition["pool.likelihood"],
        tau_prior=definition["pool.tau_prior"],
        mu_prior=definition["pool.mu_prior"],
        discounts=discounts,
    )
    x, density, closed = _grid(pooled, definition, len(entries))
    components, scale, fit = _fit_family(
        x, density, closed, definition["output.family"], measure, entries[0].scale
    )
    model = data_model(measure, scale, definition)
    notes = []
    weight = definition["discount.robust_weight"]
    if weight > 0:
        informative = Prior("informative", 0, "", scale, components)
        family = components[0].family if components[0].family in ("beta", "gamma") else "normal"
        vague = unit_information_component(
            informative.mean(), model["unit_sd"], family, scale, likelihood=model["likelihood"]
        )
        components = with_vague_component(components, vague, weight)
        notes.append(
            f"robust mixture: a vague component of weight {weight} worth one unit "
            f"of data ({model['unit']}; a unit-information prior, Schmidli et al. "
            "2014)"
        )
    prior = Prior("candidate", 0, "", scale, components)
    ess = ess_all(
        prior, unit_sd=model["unit_sd"], unit=model["unit"], likelihood=model["likelihood"]
    )
    return {
        "pooled": pooled,
        "discounts": discounts,
        "components": components,
        "scale": scale,
        "fit": fit,
        "model": model,
        "ess": ess,
        "notes": notes,
    }


def construct(definition: Definition, entries: Sequence[EntryLike]) -> Construction:
    """Build the prior's components and lineage from entries (in order) and a definition."""
    from registry.priors.ess import information_shares, solve_power_for_cap
    from registry.priors.selection import check_selection

    measure, _ = check_selection(entries)
    ratings = [rate_entry(e, definition) for e in entries]
    digest = _digest(definition, entries, ratings)
    global_power = definition["discount.global_power"]
    run = _at_power(definition, entries, ratings, global_power, measure)
    cap = definition["discount.ess_cap"]
    notes = list(run["notes"])
    if cap is not None and run["ess"]["elir"] is not None and run["ess"]["elir"] > cap:
        factor = solve_power_for_cap(
            lambda a: _at_power(definition, entries, ratings, global_power * a, measure)["ess"][
                "elir"
            ],
            cap,
        )
        global_power *= factor
        run = _at_power(definition, entries, ratings, global_power, measure)
        notes = [
            *run["notes"],
            f"global power weight {global_power:.6g} solved so that the "
            f"effective sample size (ELIR) meets the cap {cap:g}",
        ]
    pooled = run["pooled"]
    tau2 = pooled.tau2 or 0.0
    shares = information_shares(
        1.0 / (e.se**2 / d.power + d.bias_var + tau2)
        for e, d in zip(entries, run["discounts"], strict=True)
    )
    rated = tuple(
        Rated(e, r, d, s)
        for e, r, d, s in zip(entries, ratings, run["discounts"], shares, strict=True)
    )
    result = {
        "scale": run["scale"],
        "components": [c.to_dict() for c in run["components"]],
        "ess": {
            "value": run["ess"]["elir"],
            "method": "elir",
            **run["ess"],
            "unit_source": run["model"]["source"],
        },
        "pooled": pooled.to_dict(),
        "fit": run["fit"],
        "global_power": global_power,
        "target": definition["target"],
        "notes": notes,
        "plausible": _plausible(definition, run["scale"], run["components"], entries[0].scale),
    }
    return Construction(digest, run["scale"], tuple(run["components"]), rated, result)


def _plausible(
    definition: Definition, scale: str, components: Sequence[Component], analysis_scale: str
) -> dict[str, Any] | None:
    """The prior's probability inside the definition's plausible range (natural scale)."""
    from registry.values.scales import to_analysis

    bounds = definition["output.plausible"]
    if bounds is None:
        return None
    prior = Prior("candidate", 0, "", scale, tuple(components))
    lo, hi = bounds
    if scale == analysis_scale and scale != "identity":
        lo, hi = to_analysis(scale, lo), to_analysis(scale, hi)
    mass = float(prior.cdf(hi) - prior.cdf(lo))
    return {"range": list(bounds), "mass": mass}
