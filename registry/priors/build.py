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
5. a robust vague component (Schmidli et al. 2014), weakly informative and independent of
   the unit of exposure or measurement (`registry.priors.update.vague_component`);
6. effective sample size (Morita, Thall & Müller 2008; Neuenschwander et al. 2020), with an
   optional cap met by solving for the global power weight.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from registry.errors import InputError, NumericalError
from registry.priors.definition import Definition
from registry.priors.ratings import DOMAINS, Discount, Rating, discount_for, levels_for
from registry.priors.selection import EntryLike, check_selection, pool_entries
from registry.values.built import BuildResult
from registry.values.ess_methods import ESS_METHODS
from registry.values.families import Beta, Gamma, LogNormal, Normal, StudentT
from registry.values.measures import Measure
from registry.values.prior import Component, Prior

DIGEST_FORMAT = 1
# The effective sample size that is the prior's headline figure and that a cap is met on:
# the expected local information ratio (Neuenschwander, Weber, Schmidli & O'Hagan 2020).
ESS_METHOD = "expected_information"
# A frequentist predictive target is a Student-t with k - 2 degrees of freedom; below 3 it has
# no finite variance, so neither the ESS nor the emitted summaries would mean anything.
MIN_PREDICTIVE_DF = 3
# A mixture approximation must keep each method's ESS of the exact predictive within this.
ESS_BOUND = 0.05


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
    """Everything a build computes; `result` is what the registry stores, `target` the exact
    distribution the prior's components approximate (for figures and checks)."""

    digest: str
    result: BuildResult
    rated: tuple[Rated, ...]
    target: Target | None = field(default=None, repr=False, compare=False)

    @property
    def scale(self) -> str:
        return self.result.scale

    @property
    def components(self) -> tuple[Component, ...]:
        return self.result.components


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


@dataclass(frozen=True)
class Target:
    """The distribution the prior approximates, on the analysis scale: exact moments, the
    density on a grid, and its closed form where it has one."""

    mean: float
    sd: float
    x: Any = field(repr=False)
    density: Any = field(repr=False)
    closed: Component | None = None
    exact: Any = field(default=None, repr=False)  # the predictive, with pdf and ppf
    # the exact target's ESS by scale and unit of data, kept: a cap solve asks for it again
    _ess: dict[tuple[str, UnitModel], dict[str, Any]] = field(
        default_factory=dict, repr=False, compare=False
    )

    def exact_ess(self, scale: str, model: UnitModel) -> dict[str, Any]:
        """Every method's ESS of the exact target as a prior on `scale` (`ess_of_density` on
        `canonical_density`), computed once per scale and unit of data."""
        from registry.priors.ess import ess_of_density
        from registry.values.scales import SUPPORT

        key = (scale, model)
        if key not in self._ess:
            self._ess[key] = ess_of_density(
                self.canonical_density(SUPPORT[scale]),
                scale,
                unit_sd=model.unit_sd,
                unit=model.unit,
                likelihood=model.likelihood,
            )
        return self._ess[key]

    def canonical_density(self, support: str) -> Any:
        """The exact target as a density of the canonical coordinate of `support` (which is the
        analysis scale itself: logit p for a probability, log of a rate), for its ESS."""
        import numpy as np

        from registry.priors.ess import CanonicalDensity
        from registry.values.families import from_canonical

        lo, hi = (float(v) for v in self.exact.ppf([1e-10, 1 - 1e-10]))
        phi = np.linspace(lo - 2 * self.sd, hi + 2 * self.sd, 6001)
        dens = np.maximum(self.exact.pdf(phi), 1e-300)
        w = dens / dens.sum()
        x = np.asarray(from_canonical(support, phi))
        mean = float(w @ x)
        return CanonicalDensity.from_grid(
            phi, np.log(dens), support=support, mean=mean, variance=float(w @ (x - mean) ** 2)
        )


def _target(pooled: Any, definition: Definition, k: int) -> Target:
    import numpy as np

    if getattr(pooled, "predictive", None) is not None and definition["target"] == "predictive":
        p = pooled.predictive
        return Target(p.mean, p.sd, np.asarray(p.x), np.asarray(p.density), exact=p)
    if definition["target"] == "mean":
        closed = Component.of(Normal(pooled.mu, pooled.se))
    elif pooled.prediction is None:
        raise InputError(
            "a predictive target from a frequentist method needs a between-study "
            'variance and k >= 3; use method = "bayes" or target = "mean"',
            field="target",
        )
    elif k - 2 < MIN_PREDICTIVE_DF:
        raise InputError(
            f"with k = {k} studies the frequentist predictive is a Student-t with {k - 2} "
            f"degrees of freedom, whose variance is {'undefined' if k - 2 <= 1 else 'infinite'}"
            ' (its mean too, for 1); use method = "bayes" (a proper prior on tau), more '
            'studies, or target = "mean"',
            field="target",
        )
    else:
        # Higgins, Thompson & Spiegelhalter (2009): theta_new ~ mu + sqrt(tau² + se²) t_{k-2}
        closed = Component.of(
            StudentT(float(k - 2), pooled.mu, math.sqrt(pooled.tau2 + pooled.se**2))
        )
    dist = closed.dist
    x = np.linspace(dist.ppf(1e-6), dist.ppf(1 - 1e-6), 2001)
    return Target(dist.mean(), math.sqrt(dist.var()), x, dist.pdf(x), closed)


@dataclass(frozen=True)
class Fitted:
    components: tuple[Component, ...]
    scale: str
    fit: dict[str, Any]
    warnings: tuple[str, ...] = ()


FitFunction = Callable[[Target, Measure, str, int, Definition], Fitted]


def _closed(target: Target, _row: Measure, scale: str, _cap: int, _d: Definition) -> Fitted:
    if target.closed is None:
        raise InputError(
            "this target has no closed form; choose normal, mixture, or the measure's natural "
            "family",
            field="output.family",
        )
    return Fitted((target.closed,), scale, {"method": "closed form"})


def _normal(target: Target, _row: Measure, scale: str, _cap: int, _d: Definition) -> Fitted:
    """Moment matching with the target's exact mean and sd (a normal target is kept exactly)."""
    return Fitted(
        (Component.of(Normal(target.mean, target.sd)),),
        scale,
        {
            "method": "closed form"
            if target.closed is not None and target.closed.family == Normal.name
            else "moment matching (exact moments)"
        },
    )


def _lognormal(target: Target, row: Measure, scale: str, _cap: int, _d: Definition) -> Fitted:
    if scale != "log":
        raise InputError(
            "a log-normal prior needs a quantity on the log scale", field="output.family"
        )
    return Fitted(
        (Component.of(LogNormal(target.sd, math.exp(target.mean))),),
        row.natural_scale or "ratio",
        {"method": "moment matching on the log scale (exact moments)"},
    )


def _mixture_of(family: str, natural: bool) -> FitFunction:
    def fit(target: Target, row: Measure, scale: str, cap: int, definition: Definition) -> Fitted:
        from registry.synthesis.mixture import QUANTILE_ERROR_BOUND, VARIANCE_BOUND, fit_mixture

        if natural and row.natural_family != family:
            raise InputError(
                f"a {family} prior needs a measure whose natural family it is, not a {row.name}",
                field="output.family",
            )
        if target.closed is not None and target.closed.family == family:
            return _closed(target, row, scale, cap, definition)
        prior_scale = row.natural_scale if natural else scale
        check = _EssCheck(target, prior_scale, unit_model(row, prior_scale, definition))
        mixture = fit_mixture(
            target.x, target.density, family, max_components=cap, accept=check.accept
        )
        error = {**mixture.error, "ess_ratio": check.ratios(mixture.components)}
        warnings = ()
        if not mixture.meets_bounds:
            warnings = (
                f"the {family} mixture approximation misses its bounds with {cap} components at "
                f"most: quantile error {error['quantile_relative']:.3g} of the sd (bound "
                f"{QUANTILE_ERROR_BOUND:g}), variance ratio {error['variance_ratio']:.4g} "
                f"(bound 1 ± {VARIANCE_BOUND:g}), ESS of each method over the exact "
                f"predictive's {_ratios_text(error['ess_ratio'])} (bound 1 ± {ESS_BOUND:g}); "
                "raise output.max_components or choose another family",
            )
        return Fitted(
            mixture.components,
            prior_scale,
            {
                "method": "EM mixture fit",
                "components": mixture.n_components,
                "meets_bounds": mixture.meets_bounds,
                "max_components": cap,
                **error,
            },
            warnings,
        )

    return fit


def _ratios_text(ratios: Mapping[str, float | None]) -> str:
    if not ratios:
        return "not compared (no exact predictive)"
    return ", ".join(f"{k} {'none' if v is None else format(v, '.4g')}" for k, v in ratios.items())


@dataclass(frozen=True)
class _EssCheck:
    """Whether a mixture keeps the effective sample size of the exact predictive it stands
    for: each method's ESS within `ESS_BOUND` (relative), or absent from both."""

    target: Target
    scale: str
    model: UnitModel
    # each candidate's ESS, kept: the chosen one is asked for again for its ratios
    _seen: dict[tuple[Component, ...], dict[str, Any]] = field(
        default_factory=dict, repr=False, compare=False
    )

    def _ess(self, components: tuple[Component, ...]) -> dict[str, Any]:
        from registry.priors.ess import ess_all

        if components not in self._seen:
            self._seen[components] = ess_all(
                Prior.candidate(self.scale, components),
                unit_sd=self.model.unit_sd,
                unit=self.model.unit,
                likelihood=self.model.likelihood,
            )
        return self._seen[components]

    @property
    def exact(self) -> dict[str, Any]:
        return self.target.exact_ess(self.scale, self.model)

    def ratios(self, components: tuple[Component, ...]) -> dict[str, float | None]:
        """Mixture ESS over exact ESS by method (None where either does not exist or the
        exact one is 0)."""
        if self.target.exact is None:
            return {}
        mixture = self._ess(components)
        return {
            m: (None if mixture[m] is None or not self.exact[m] else mixture[m] / self.exact[m])
            for m in ESS_METHODS
        }

    def accept(self, candidate: Any) -> bool:
        """Each method's ESS within `ESS_BOUND` of the exact one, or within half a unit of data
        (a difference no reported ESS can show), or absent from both."""
        if self.target.exact is None:
            return True
        mixture = self._ess(candidate.components)
        for m in ESS_METHODS:
            got, want = mixture[m], self.exact[m]
            if (got is None) != (want is None):
                return False
            if got is not None and abs(got - want) > max(ESS_BOUND * abs(want), 0.5):
                return False
        return True


# output.family -> how the target becomes the prior's components
_FAMILY_FITS: dict[str, FitFunction] = {
    "closed": _closed,
    StudentT.name: _closed,
    Normal.name: _normal,
    LogNormal.name: _lognormal,
    Beta.name: _mixture_of(Beta.name, natural=True),
    Gamma.name: _mixture_of(Gamma.name, natural=True),
    "mixture": _mixture_of(Normal.name, natural=False),
}


def _fit_family(target: Target, definition: Definition, row: Measure, scale: str) -> Fitted:
    """Components of the output family and the scale they live on, with the fit's error."""
    family = definition["output.family"]
    if family == "auto":
        family = "closed" if target.closed is not None else row.natural_family or "mixture"
    return _FAMILY_FITS[family](target, row, scale, definition["output.max_components"], definition)


@dataclass(frozen=True)
class UnitModel:
    """One unit of data for the effective sample size, and where its size comes from."""

    likelihood: str
    unit_sd: float | None
    unit: str
    source: str


def unit_model(row: Measure, scale: str, definition: Definition) -> UnitModel:
    """One unit of new data: a participant or unit of exposure for counts (Fisher information
    of one observation), else one observation of sd `output.unit_sd` on the analysis scale (or
    the measure's default, with its source)."""
    if row.count is not None and scale in (row.scale, row.natural_scale):
        return UnitModel(
            row.count.likelihood,
            None,
            definition["output.ess_unit"] or row.count.unit,
            "Fisher information of one observation",
        )
    unit_sd = definition["output.unit_sd"]
    if unit_sd is not None:
        return UnitModel(
            "normal",
            unit_sd,
            definition["output.ess_unit"] or "participants",
            "output.unit_sd of the definition",
        )
    if row.unit_sd is None:
        raise InputError(
            f"the effective sample size of a {row.name} prior needs output.unit_sd (the sd of "
            "one unit's observation, in the outcome's units)",
            field="output.unit_sd",
        )
    return UnitModel(
        "normal",
        row.unit_sd.sd,
        definition["output.ess_unit"] or row.unit_sd.unit,
        row.unit_sd.source,
    )


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


@dataclass(frozen=True)
class _Run:
    """Steps 2-6 at one global power weight."""

    pooled: Any
    discounts: tuple[Discount, ...]
    target: Target
    fitted: Fitted
    components: tuple[Component, ...]
    model: UnitModel
    ess: dict[str, Any]
    robust: dict[str, Any] | None


def _pooled_target(
    definition: Definition,
    entries: Sequence[EntryLike],
    ratings: Sequence[tuple[Rating, ...]],
    global_power: float,
    retracted_ok: bool,
) -> tuple[tuple[Discount, ...], Any, Target]:
    """Steps 2 and 3 at one global power weight: discounts, pooled result, target."""
    discounts = tuple(_discounts(ratings, definition, global_power))
    pooled = pool_entries(
        entries,
        method=definition["pool.method"],
        likelihood=definition["pool.likelihood"],
        tau_prior=definition["pool.tau_prior"],
        mu_prior=definition["pool.mu_prior"],
        discounts=discounts,
        unit_sd=definition["output.unit_sd"],
        include_retracted=retracted_ok,
    )
    return discounts, pooled, _target(pooled, definition, len(entries))


def _at_power(
    definition: Definition,
    entries: Sequence[EntryLike],
    ratings: Sequence[tuple[Rating, ...]],
    global_power: float,
    row: Measure,
    retracted_ok: bool,
    pooled_target: tuple[tuple[Discount, ...], Any, Target] | None = None,
) -> _Run:
    """Steps 2-6 at one global power weight; `pooled_target` is steps 2-3 at that weight
    where they have been done already."""
    from registry.priors.ess import ess_all
    from registry.priors.update import vague_component, with_vague_component

    discounts, pooled, target = (
        _pooled_target(definition, entries, ratings, global_power, retracted_ok)
        if pooled_target is None
        else pooled_target
    )
    fitted = _fit_family(target, definition, row, row.scale)
    model = unit_model(row, fitted.scale, definition)
    components = fitted.components
    robust = None
    weight = definition["discount.robust_weight"]
    if weight > 0:
        vague = vague_component(
            Prior.candidate(fitted.scale, components),
            definition["discount.robust_component"],
            likelihood=model.likelihood,
            unit_sd=model.unit_sd,
        )
        components = with_vague_component(components, vague.component, weight)
        alone = ess_all(
            Prior.candidate(fitted.scale, (vague.component,)),
            unit_sd=model.unit_sd,
            unit=model.unit,
            likelihood=model.likelihood,
        )
        robust = {
            "weight": weight,
            "component": vague.component.to_dict(),
            "description": vague.description,
            "ess": alone["variance_match"],
            "unit": model.unit,
        }
    ess = ess_all(
        Prior.candidate(fitted.scale, components),
        unit_sd=model.unit_sd,
        unit=model.unit,
        likelihood=model.likelihood,
    )
    return _Run(pooled, discounts, target, fitted, components, model, ess, robust)


# A solved cap is accepted when the built prior's ESS is within this of the cap (relative):
# the tolerance of `registry.priors.ess.solve_power_for_cap`.
CAP_TOLERANCE = 0.005
# Builds tried at solved weights before the cap is declared unsolvable (usually one or two).
CAP_BUILDS = 5


def _solve_cap(
    definition: Definition,
    entries: Sequence[EntryLike],
    ratings: Sequence[tuple[Rating, ...]],
    row: Measure,
    retracted_ok: bool,
    run: _Run,
    global_power: float,
) -> tuple[float, _Run]:
    """The global power weight at which the prior's ESS meets `discount.ess_cap`, and the
    build at that weight.

    The weight scales the pooled likelihood; the mixture fitted to the target only has to
    keep the target's ESS (within `ESS_BOUND`). So the root is found on the exact target's
    ESS (pooling and the target's density grid, no mixture fit) times the ratio of the built
    prior's ESS to the exact target's at the last weight built, which absorbs the mixture's
    approximation and the robust component and changes slowly with the weight. The prior is
    then built once at the answer; where its ESS misses the cap by more than
    `CAP_TOLERANCE` the ratio is renewed there and the root found again. A target without
    an exact predictive has a closed-form fit that costs nothing, so every step builds.
    """
    from registry.priors.ess import power_for_ess_cap, solve_power_for_cap

    cap = definition["discount.ess_cap"]

    # steps 2-3 at each weight tried, kept: the solver and the builds ask again at a weight
    done = {1.0: (run.discounts, run.pooled, run.target)}

    def pooled_at(a: float) -> tuple[tuple[Discount, ...], Any, Target]:
        if a not in done:
            done[a] = _pooled_target(definition, entries, ratings, global_power * a, retracted_ok)
        return done[a]

    def build_at(a: float) -> _Run:
        return _at_power(
            definition, entries, ratings, global_power * a, row, retracted_ok, pooled_at(a)
        )

    if run.target.exact is None:
        a = power_for_ess_cap(lambda a: build_at(a).ess, cap, method=ESS_METHOD)
        return global_power * a, build_at(a)

    def exact(a: float) -> float | None:
        return pooled_at(a)[2].exact_ess(run.fitted.scale, run.model)[ESS_METHOD]

    a, built = 1.0, run
    for _ in range(CAP_BUILDS):
        at_built = exact(a)
        if at_built is None:
            break  # the solver below says why
        ratio = built.ess[ESS_METHOD] / at_built
        # the weights tried so far cost nothing to ask again: they bracket the next root
        a = solve_power_for_cap(
            lambda w, r=ratio: None if exact(w) is None else r * exact(w),
            cap,
            method=ESS_METHOD,
            known=tuple(done),
        )
        built = build_at(a)
        if _meets_cap(built, cap):
            return global_power * a, built
    raise NumericalError(
        f"the global power weight for the ESS cap {cap:g} was not found in {CAP_BUILDS} "
        f"builds (the last, at {global_power * a:.6g}, has ESS "
        f"{built.ess[ESS_METHOD]:.6g}); remove discount.ess_cap or change the output family"
    )


def inputs_digest(definition: Definition, entries: Sequence[EntryLike]) -> str:
    """The digest a build of `definition` on `entries` will have, computed before (and
    without) any pooling: it depends only on the definition, the entries and their ratings."""
    return _digest(definition, entries, [rate_entry(e, definition) for e in entries])


def _meets_cap(run: _Run, cap: float) -> bool:
    value = run.ess[ESS_METHOD]
    return value is not None and abs(value / cap - 1.0) <= CAP_TOLERANCE


def unmatched_rules(definition: Definition, entries: Sequence[EntryLike]) -> list[str]:
    """Names of the rules whose `where` matches none of the entries (a typo applies nothing)."""
    return [
        r["name"] for r in definition["rule"] if not any(_matches(r["where"], e) for e in entries)
    ]


def idle_rules(
    definition: Definition, entries: Sequence[EntryLike], *, strict: bool = False
) -> list[str]:
    """A warning for each rule that matches no entry; with `strict`, an error instead."""
    idle = [
        f"rule {name!r} matches no selected entry" for name in unmatched_rules(definition, entries)
    ]
    if idle and strict:
        raise InputError(f"{idle[0]} (--strict)", field="rule", path=definition.path)
    return idle


def construct(
    definition: Definition,
    entries: Sequence[EntryLike],
    *,
    rebuild: bool = False,
    strict: bool = False,
    solved_power: float | None = None,
) -> Construction:
    """Build the prior's components and lineage from entries (in order) and a definition.

    `rebuild` is for verifying a stored version from exactly the revisions it used: entries
    whose source has since been retracted are then kept (the version is reported stale).
    `solved_power` is the global power weight a stored version solved its ESS cap with: it
    is built first and kept if its ESS meets the cap (ESS grows with the weight, so a weight
    below the definition's that meets the cap is the cap's solution), so that verifying
    costs one build; otherwise the cap is solved again. A rule that matches no entry is a
    warning, or with `strict` an error.
    """
    from registry.priors.ess import information_shares

    row = check_selection(entries)
    idle = idle_rules(definition, entries, strict=strict)
    ratings = [rate_entry(e, definition) for e in entries]
    digest = _digest(definition, entries, ratings)
    global_power = definition["discount.global_power"]
    retracted_ok = rebuild or definition["select.include_retracted"]
    cap = definition["discount.ess_cap"]
    notes = list(idle)
    run = None
    if cap is not None and solved_power is not None and solved_power < global_power:
        run = _at_power(definition, entries, ratings, solved_power, row, retracted_ok)
        run = run if _meets_cap(run, cap) else None
    if run is not None:
        global_power = solved_power
    else:
        run = _at_power(definition, entries, ratings, global_power, row, retracted_ok)
        headline = run.ess[ESS_METHOD]
        if cap is not None and headline is None:
            raise InputError(
                f"the ESS cap is met on the {ESS_METHOD} effective sample size, which does not "
                f"exist for this prior ({run.ess['notes'].get(ESS_METHOD, 'no value')}); "
                "remove discount.ess_cap, or change the output family or the robust component",
                field="discount.ess_cap",
            )
        if cap is not None and headline > cap:
            global_power, run = _solve_cap(
                definition, entries, ratings, row, retracted_ok, run, global_power
            )
    if global_power != definition["discount.global_power"]:
        notes.append(
            f"global power weight {global_power:.6g} solved so that the effective sample size "
            f"({ESS_METHOD}) meets the cap {cap:g}"
        )
    if run.robust is not None:
        notes.append(
            f"robust mixture (Schmidli et al. 2014): a vague component of weight "
            f"{run.robust['weight']:g}, {run.robust['description']}"
        )
    fit = run.fitted.fit
    if fit.get("meets_bounds"):  # a miss is stated by its warning instead
        notes.append(
            f"mixture approximation: {fit['components']} component(s) within the bounds; "
            f"largest quantile error {fit['quantile_relative']:.3g} of the sd, variance ratio "
            f"{fit['variance_ratio']:.4g}, ESS over the exact predictive's: "
            f"{_ratios_text(fit['ess_ratio'])}"
        )
    notes.extend(run.fitted.warnings)
    tau2 = run.pooled.tau2 or 0.0
    shares = information_shares(
        1.0 / (e.se**2 / d.power + d.bias_var + tau2)
        for e, d in zip(entries, run.discounts, strict=True)
    )
    rated = tuple(
        Rated(e, r, d, s)
        for e, r, d, s in zip(entries, ratings, run.discounts, shares, strict=True)
    )
    ess = {
        "value": run.ess[ESS_METHOD],
        "method": ESS_METHOD,
        **run.ess,
        "unit_source": run.model.source,
    }
    result = BuildResult(
        scale=run.fitted.scale,
        measure=row.name,
        components=run.components,
        ess=ess,
        pooled=run.pooled.to_dict(),
        fit=run.fitted.fit,
        global_power=global_power,
        target=definition["target"],
        notes=tuple(notes),
        warnings=(*idle, *run.fitted.warnings),
        plausible=_plausible(definition, run.fitted.scale, run.components, row.scale),
        robust=run.robust,
        include_retracted=definition["select.include_retracted"],
    )
    return Construction(digest, result, rated, run.target)


def _plausible(
    definition: Definition, scale: str, components: Sequence[Component], analysis_scale: str
) -> dict[str, Any] | None:
    """The prior's probability inside the definition's plausible range (natural scale)."""
    from registry.values.scales import to_analysis

    bounds = definition["output.plausible"]
    if bounds is None:
        return None
    prior = Prior.candidate(scale, tuple(components))
    lo, hi = bounds
    if scale == analysis_scale and scale != "identity":
        lo, hi = to_analysis(scale, lo), to_analysis(scale, hi)
    mass = float(prior.cdf(hi) - prior.cdf(lo))
    return {"range": list(bounds), "mass": mass}
