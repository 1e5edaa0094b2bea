"""Operating characteristics of a planned trial that borrows through a stored prior.

A design is evaluated, never simulated, wherever an exact route exists, and for every design
this module accepts one does:

- **counts** (a beta prior and binary outcomes, or a gamma prior and Poisson counts): every
  possible outcome (pair) is enumerated once and its posterior probability of success computed
  once, since it does not depend on the truth; each scenario then weights the outcomes by their
  binomial or Poisson probabilities (the exact operating characteristics of a Bayesian decision
  rule; common practice, e.g. Berry, Carlin, Lee & Müller 2010, *Bayesian Adaptive Methods for
  Clinical Trials*, ch. 2, recalled from memory). Poisson outcomes are enumerated up to a count
  whose upper tail probability is below `POISSON_TAIL` in every scenario; the bound is stated.
- **a normal estimate** y ~ N(theta, se²) with a normal-mixture prior on theta: the posterior
  probability is increasing in y (the normal likelihood has a monotone likelihood ratio, so
  the posterior is stochastically increasing in y; Karlin & Rubin 1956, recalled from memory),
  so success is y beyond one cut-off y*, found by root finding, and every probability is a
  normal tail.

Posteriors are the conjugate mixture updates of `registry.priors.update.update` (Schmidli et
al. 2014). In a two-arm count design the control posterior (a beta or gamma mixture) and the
treatment posterior (one conjugate component) are combined by one-dimensional quadrature:
P(contrast beyond margin | data) = ∫ f_c(v | x_c) T_t(b(v) | x_t) dv, with T_t the treatment
posterior's tail beyond the boundary b(v) = v shifted by the margin; the integral runs over the
canonical coordinate phi = logit p or log lambda (where the densities are smooth), by the
trapezoid rule on a uniform grid finer than an eighth of the narrowest component's
interquartile range and covering each component to its 1e-12 quantiles. For all outcome pairs
at once this is one matrix product (weights x_c by grid) @ (grid by x_t).

Calibration: the threshold C on a grid of step 0.001 whose type I error is at most alpha at the
prior's median control value (or the worst case over the scenarios), with the next lower grid
value's shown (the FDA's January 2026 draft guidance on Bayesian methodology describes
calibrating a posterior-probability threshold to a frequentist error rate). Assurance is the
probability of success averaged over the prior of the truth (O'Hagan, Stevens & Campbell 2005,
*Pharmaceutical Statistics* 4:187).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from registry.caution import CAUTION
from registry.errors import InputError, NumericalError
from registry.priors.update import update, vague_component
from registry.values.families import from_canonical, to_canonical
from registry.values.measures import measure as measure_row
from registry.values.prior import Component, Prior

DESIGN_CAUTION = (
    "These figures support, and do not replace, qualified statistical review: the design, the "
    "prior and the decision rule must be pre-specified in the protocol, and local regulations "
    "followed. " + CAUTION
)

BETTER = {"higher": 1.0, "lower": -1.0}
CALIBRATE = ("central", "worst")
# Thresholds tried by calibration: 0.500, 0.501, ..., 0.999.
THRESHOLDS = tuple(round(0.5 + i / 1000, 3) for i in range(500))
POISSON_TAIL = 1e-10
GRID_TAIL = 1e-12
# Assurance integrates the prior between these quantiles; the mass left out is stated.
ASSURANCE_TAIL = 1e-4
MAX_GRID = 200_000

Progress = Callable[[str, float], None]


def _quiet(_what: str, _fraction: float) -> None:
    return None


@dataclass(frozen=True)
class Contrast:
    """How the treatment's value relates to the control's: `shift(v, d)` is the value d beyond v
    on the contrast's scale."""

    name: str
    shift: Callable[[Any, float], Any]


_DIFFERENCE = Contrast("difference (treatment minus control)", lambda v, d: v + d)
_LOG_RATIO = Contrast("log rate ratio (treatment over control)", lambda v, d: v * math.exp(d))


def _binomial_pmf(x: Any, truth: Any, n: float) -> Any:
    from scipy import stats

    return stats.binom.pmf(x[None, :], int(n), np.asarray(truth, dtype=float)[:, None])


def _poisson_pmf(x: Any, truth: Any, exposure: float) -> Any:
    from scipy import stats

    return stats.poisson.pmf(x[None, :], np.asarray(truth, dtype=float)[:, None] * exposure)


def _binomial_top(_truths: Any, n: float) -> int:
    return int(n)


def _poisson_top(truths: Any, exposure: float) -> int:
    from scipy import stats

    return int(stats.poisson.isf(POISSON_TAIL, float(np.max(truths)) * exposure)) + 1


@dataclass(frozen=True)
class Endpoint:
    """One row of the endpoint table: the likelihood a prior's family is conjugate to."""

    likelihood: str
    outcome: str
    sizes: tuple[str, str | None]  # DesignSpec fields of the control and treatment sizes
    contrast: Contrast
    pmf: Callable[[Any, Any, float], Any] | None = None
    top: Callable[[Any, float], int] | None = None
    truncated: bool = False  # the outcomes are cut at a tail bound (counts with no maximum)

    @property
    def counts(self) -> bool:
        """Outcomes are counts, enumerated exactly (else a normal estimate)."""
        return self.pmf is not None

    def options(self) -> str:
        return " and ".join(_option(s) for s in self.sizes if s)


ENDPOINTS: dict[str, Endpoint] = {
    "binomial": Endpoint(
        "binomial",
        "binary outcomes (events among n participants)",
        ("control_n", "treatment_n"),
        _DIFFERENCE,
        _binomial_pmf,
        _binomial_top,
    ),
    "poisson": Endpoint(
        "poisson",
        "event counts (Poisson, events in an exposure)",
        ("control_exposure", "treatment_exposure"),
        _LOG_RATIO,
        _poisson_pmf,
        _poisson_top,
        truncated=True,
    ),
    "normal": Endpoint(
        "normal",
        "a normal estimate on the prior's scale with a planned standard error",
        ("se", None),
        Contrast("difference on the prior's scale", lambda v, d: v + d),
    ),
}
_SIZE_FIELDS = ("control_n", "treatment_n", "control_exposure", "treatment_exposure", "se")


def _option(name: str) -> str:
    return "--" + name.replace("_", "-")


@dataclass(frozen=True)
class DesignSpec:
    """A planned trial and its decision rule (natural scale for truths; the contrast's scale,
    see `ENDPOINTS`, for `margin` and `effects`)."""

    control_n: int | None = None
    treatment_n: int | None = None
    control_exposure: float | None = None
    treatment_exposure: float | None = None
    se: float | None = None
    reference: float | None = None
    margin: float = 0.0
    threshold: float = 0.975
    better: str = "higher"
    futility: float | None = None
    truths: tuple[float, ...] | None = None
    effects: tuple[float, ...] = (0.0,)
    treatment_prior: str = "auto"
    alpha: float | None = None
    calibrate: str = "central"


@dataclass(frozen=True)
class Scenario:
    """One truth: the probability of success with the prior and without borrowing, and the
    bias and root mean squared error of the posterior mean of the parameter the prior is on."""

    control: float
    treatment: float | None
    effect: float | None
    success: float
    success_without_borrowing: float
    bias: float
    rmse: float
    bias_without_borrowing: float
    rmse_without_borrowing: float
    futility: float | None = None
    futility_without_borrowing: float | None = None
    success_calibrated: float | None = None

    def to_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


@dataclass(frozen=True)
class Calibration:
    threshold: float | None
    type1: float | None
    next_threshold: float | None
    next_type1: float | None
    at: str
    reason: str = ""

    def to_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


@dataclass(frozen=True)
class Assurance:
    effect: float
    assurance: float
    assurance_without_borrowing: float
    error_bound: float

    def to_dict(self) -> dict[str, Any]:
        return dict(self.__dict__)


@dataclass(frozen=True)
class DesignResult:
    prior: dict[str, Any]
    design: dict[str, Any]
    method: dict[str, Any]
    threshold: float
    scenarios: tuple[Scenario, ...]
    calibrated_threshold: Calibration | None
    assurance: tuple[Assurance, ...] | None
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()

    def to_dict(self) -> dict[str, Any]:
        return {
            "prior": self.prior,
            "design": self.design,
            "method": self.method,
            "threshold": self.threshold,
            "scenarios": [s.to_dict() for s in self.scenarios],
            "calibrated_threshold": (
                None if self.calibrated_threshold is None else self.calibrated_threshold.to_dict()
            ),
            "assurance": None if self.assurance is None else [a.to_dict() for a in self.assurance],
            "notes": list(self.notes),
            "warnings": list(self.warnings),
            "caution": DESIGN_CAUTION,
        }


# ---- posteriors --------------------------------------------------------------------------


def _mean(components: Sequence[Component]) -> float:
    return math.fsum(c.weight * c.dist.mean() for c in components)


def _tail(components: Sequence[Component], boundary: Any, sign: float) -> Any:
    """P(value beyond `boundary` in the better direction) under a mixture (scipy.stats' sf or
    cdf of each family, called unfrozen: freezing costs more than the evaluation)."""
    from scipy import stats

    total: Any = 0.0
    for c in components:
        dist = getattr(stats, c.dist.scipy_name)
        total = total + c.weight * (dist.sf if sign > 0 else dist.cdf)(boundary, **c.params)
    return total


def _quantile(components: Sequence[Component], q: float) -> float:
    """The q-quantile of a mixture, by root finding on its cdf between component quantiles."""
    from scipy.optimize import brentq

    support = components[0].support
    ends = [float(from_canonical(support, c.dist.canonical_ppf(q))) for c in components]
    lo, hi = min(ends), max(ends)
    if lo == hi:
        return lo
    return float(brentq(lambda x: float(_tail(components, x, -1.0)) - q, lo, hi, xtol=1e-12))


def _treatment_tails(
    posteriors: Sequence[Sequence[Component]], boundaries: Any, sign: float
) -> Any:
    """Rows of `_tail` over the grid's boundaries, evaluated only where a row's posterior has
    mass between its 1e-15 quantiles (elsewhere the tail is 0 or 1 to that accuracy)."""
    support = posteriors[0][0].support
    edge = to_canonical(support, np.clip(boundaries, 0.0, 1.0) if support == "unit" else boundaries)
    out = np.empty((len(posteriors), len(boundaries)))
    for j, components in enumerate(posteriors):
        lo = min(c.dist.canonical_ppf(1e-15) for c in components)
        hi = max(c.dist.canonical_ppf(1 - 1e-15) for c in components)
        i, k = np.searchsorted(edge, [lo, hi])
        below, above = (1.0, 0.0) if sign > 0 else (0.0, 1.0)
        out[j, :i], out[j, k:] = below, above
        out[j, i:k] = _tail(components, boundaries[i:k], sign)
    return out


def _canonical_grid(mixtures: Sequence[Sequence[Component]]) -> Any:
    """A uniform grid of the canonical coordinate that covers every component of weight above
    1e-14 to its GRID_TAIL quantiles, with a step of an eighth of the narrowest component's
    interquartile range (trapezoid rule; its error is measured by `_grid_weights`)."""
    lo, hi, width = math.inf, -math.inf, math.inf
    for components in mixtures:
        for c in components:
            if c.weight < 1e-14:
                continue
            d = c.dist
            q25, q75 = d.canonical_ppf(0.25), d.canonical_ppf(0.75)
            ends = [d.canonical_ppf(GRID_TAIL), d.canonical_ppf(1 - GRID_TAIL)]
            # an underflowing quantile (a shape far below 1) stops 60 units out, beyond which
            # the mass is far below any figure shown
            ends = [e if math.isfinite(e) else q25 - 60 if e < 0 else q75 + 60 for e in ends]
            lo, hi, width = min(lo, ends[0]), max(hi, ends[1]), min(width, q75 - q25)
    count = math.ceil((hi - lo) / (width / 6)) + 1
    if count > MAX_GRID:
        raise NumericalError(
            f"the quadrature grid would need {count} points (a very narrow component against a "
            "wide range); use fewer participants or exposure, or a less concentrated prior"
        )
    return np.linspace(lo, hi, max(count, 64))


def _grid_weights(mixtures: Sequence[Sequence[Component]], phi: Any) -> tuple[Any, float]:
    """Quadrature weights of each mixture's density on the canonical grid (rows sum to 1) and
    the largest departure of an unnormalised row sum from 1 (the quadrature's error)."""
    step = float(phi[1] - phi[0])
    rows = np.empty((len(mixtures), len(phi)))
    for i, components in enumerate(mixtures):
        rows[i] = sum(c.weight * np.exp(c.dist.canonical_terms(phi)[0]) for c in components)
    total = rows.sum(axis=1) * step
    return rows * step / total[:, None], float(np.max(np.abs(total - 1.0)))


# ---- engines: each answers the same questions for one kind of endpoint ---------------------


class _Counts:
    """Binary or Poisson outcomes, one arm against a reference or two arms, by enumeration."""

    def __init__(
        self,
        endpoint: Endpoint,
        prior: Sequence[Component],
        vague: Sequence[Component],
        sizes: tuple[float, float | None],
        boundary: float | None,
        sign: float,
        margin: float,
        support: str,
        largest: tuple[float, float],
        progress: Progress,
    ) -> None:
        self.endpoint, self.sizes, self.sign, self.support = endpoint, sizes, sign, support
        assert endpoint.top is not None
        control = np.arange(endpoint.top(largest[0], sizes[0]) + 1)
        self.outcomes = [control]
        self.tail_bound = 0.0
        posteriors = {}
        for name, components in (("prior", prior), ("vague", vague)):
            posteriors[name] = [update(components, float(x), sizes[0]) for x in control]
            progress("posteriors of the control arm", 0.1 if name == "prior" else 0.2)
        self.means = {k: np.array([_mean(p) for p in v]) for k, v in posteriors.items()}
        self.quadrature_error = 0.0
        if sizes[1] is None:
            self.probability = {
                k: np.array([float(_tail(p, boundary, sign)) for p in v])
                for k, v in posteriors.items()
            }
            progress("posterior probabilities", 0.9)
            return
        treatment = np.arange(endpoint.top(largest[1], sizes[1]) + 1)
        self.outcomes.append(treatment)
        phi = _canonical_grid([*posteriors["prior"], *posteriors["vague"]])
        weights = {}
        for k, v in posteriors.items():
            weights[k], error = _grid_weights(v, phi)
            self.quadrature_error = max(self.quadrature_error, error)
        # grid points where no posterior has weight above 1e-18 add nothing to any probability
        keep = np.maximum(weights["prior"].max(axis=0), weights["vague"].max(axis=0)) > 1e-18
        phi = phi[keep]
        boundaries = endpoint.contrast.shift(from_canonical(support, phi), sign * margin)
        tails = _treatment_tails(
            [update(vague, float(x), sizes[1]) for x in treatment], boundaries, sign
        )
        progress("posteriors of the treatment arm", 0.7)
        self.probability = {
            k: np.clip(np.ascontiguousarray(w[:, keep]) @ tails.T, 0.0, 1.0)
            for k, w in weights.items()
        }
        progress("posterior probabilities", 0.9)
        self.grid_points = len(phi)

    def _pmfs(self, control: Any, treatment: Any | None) -> tuple[Any, Any | None]:
        pmf = self.endpoint.pmf
        assert pmf is not None
        pc = pmf(self.outcomes[0], control, self.sizes[0])
        pt = None if treatment is None else pmf(self.outcomes[1], treatment, self.sizes[1])
        return pc, pt

    @staticmethod
    def _weigh(region: Any, pc: Any, pt: Any | None) -> Any:
        return pc @ region if pt is None else np.sum((pc @ region) * pt, axis=1)

    def success(self, c: float, control: Any, treatment: Any | None, key: str) -> Any:
        pc, pt = self._pmfs(control, treatment)
        return self._weigh(self.probability[key] > c, pc, pt)

    def futility(self, f: float, control: Any, treatment: Any | None, key: str) -> Any:
        pc, pt = self._pmfs(control, treatment)
        return self._weigh(self.probability[key] < f, pc, pt)

    def bias_rmse(self, control: Any, key: str) -> tuple[Any, Any]:
        pc, _ = self._pmfs(control, None)
        error = self.means[key][None, :] - np.asarray(control)[:, None]
        return np.sum(pc * error, axis=1), np.sqrt(np.sum(pc * error**2, axis=1))

    def omitted(self, control: Any, treatment: Any | None) -> float:
        """The largest outcome probability left out by truncation in these scenarios."""
        pc, pt = self._pmfs(control, treatment)
        left = 1.0 - pc.sum(axis=1)
        if pt is not None:
            left = left + 1.0 - pt.sum(axis=1)
        return float(max(np.max(left, initial=0.0), 0.0))


class _Normal:
    """y ~ N(theta, se²) with a normal-mixture prior on theta; success is y beyond y*."""

    def __init__(self, prior: Sequence[Component], se: float, boundary: float, sign: float) -> None:
        self.prior, self.se, self.boundary, self.sign = tuple(prior), se, boundary, sign
        self.quadrature_error = 0.0
        spread = se + max(c.dist.var() ** 0.5 for c in self.prior)
        centre = [boundary, *(c.dist.mean() for c in self.prior)]
        self.range = (min(centre) - 60 * spread, max(centre) + 60 * spread)

    def probability(self, y: float, key: str) -> float:
        if key == "vague":  # a flat prior: theta | y ~ N(y, se²)
            from scipy.special import ndtr

            return float(ndtr(self.sign * (y - self.boundary) / self.se))
        return float(_tail(update(self.prior, y, self.se), self.boundary, self.sign))

    def cut(self, c: float, key: str) -> float:
        """y* with P(success event | y*) = c; +-inf when no y reaches c."""
        from scipy.optimize import brentq

        lo, hi = self.range
        f_lo, f_hi = self.probability(lo, key) - c, self.probability(hi, key) - c
        if f_lo * f_hi > 0:
            # the probability never crosses c: success everywhere or nowhere in the range
            return -self.sign * math.inf if min(f_lo, f_hi) > 0 else self.sign * math.inf
        return float(brentq(lambda y: self.probability(y, key) - c, lo, hi, xtol=1e-12))

    def _beyond(self, cut: float, theta: Any) -> Any:
        from scipy.special import ndtr

        return ndtr(self.sign * (np.asarray(theta, dtype=float) - cut) / self.se)

    def success(self, c: float, control: Any, _treatment: Any, key: str) -> Any:
        return self._beyond(self.cut(c, key), control)

    def futility(self, f: float, control: Any, _treatment: Any, key: str) -> Any:
        return 1.0 - self._beyond(self.cut(f, key), control)

    def bias_rmse(self, control: Any, key: str) -> tuple[Any, Any]:
        """E over y ~ N(theta, se²) by Gauss-Hermite quadrature (60 nodes)."""
        theta = np.asarray(control, dtype=float)
        if key == "vague":
            return np.zeros_like(theta), np.full_like(theta, self.se)
        nodes, weights = np.polynomial.hermite.hermgauss(60)
        weights = weights / math.sqrt(math.pi)
        bias, rmse = [], []
        for t in theta:
            ys = t + math.sqrt(2) * self.se * nodes
            error = np.array([_mean(update(self.prior, float(y), self.se)) for y in ys]) - t
            bias.append(weights @ error)
            rmse.append(math.sqrt(weights @ error**2))
        return np.array(bias), np.array(rmse)

    def omitted(self, _control: Any, _treatment: Any) -> float:
        return 0.0

    def assurance(self, c: float, key: str) -> float:
        """P(y beyond y*) under the prior predictive of y (each component's `predictive`)."""
        cut = self.cut(c, key)
        return math.fsum(
            c_.weight
            * float(
                c_.dist.predictive(self.se).sf(cut)
                if self.sign > 0
                else c_.dist.predictive(self.se).cdf(cut)
            )
            for c_ in self.prior
        )


# ---- the design as a whole ---------------------------------------------------------------


def truth_grid(text: str) -> tuple[float, ...]:
    """`LO:HI:K`: K equally spaced values from LO to HI."""
    parts = text.split(":")
    try:
        lo, hi, k = float(parts[0]), float(parts[1]), int(parts[2])
        if len(parts) != 3:
            raise ValueError
    except (ValueError, IndexError):
        raise InputError(f"expected LO:HI:K, got {text!r}", field="--truth") from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi and k >= 2):
        raise InputError(f"need finite LO < HI and K >= 2, got {text!r}", field="--truth")
    return tuple(float(v) for v in np.linspace(lo, hi, k))


def _endpoint(prior: Prior) -> Endpoint:
    likelihoods = {c.dist.conjugate for c in prior.components}
    if len(likelihoods) != 1 or None in likelihoods:
        raise InputError(
            f"{prior.label} has {', '.join(sorted({c.family for c in prior.components}))} "
            "components; a design needs all beta (binary outcomes), all gamma (counts) or all "
            "normal (an estimate) components",
            field="prior",
        )
    (likelihood,) = likelihoods
    row = measure_row(prior.measure) if prior.measure else None
    if row is not None and row.count is not None and row.count.likelihood != likelihood:
        raise InputError(
            f"{prior.label} is a {prior.measure} on the {prior.scale} scale with "
            f"{prior.components[0].family} components; its endpoint needs the conjugate "
            f"{row.natural_family} family (rebuild it with output.family = auto)",
            field="prior",
        )
    return ENDPOINTS[likelihood]


def _sizes(spec: DesignSpec, endpoint: Endpoint, label: str, measure: str) -> tuple[float, ...]:
    wrong = [f for f in _SIZE_FIELDS if getattr(spec, f) is not None and f not in endpoint.sizes]
    if wrong:
        raise InputError(
            f"{label} is a {measure or 'prior'} prior, so the endpoint is {endpoint.outcome}: "
            f"give {endpoint.options()}, not {_option(wrong[0])}",
            field=_option(wrong[0]),
        )
    out = []
    for name in endpoint.sizes:
        value = None if name is None else getattr(spec, name)
        if value is None:
            out.append(None)
            continue
        integer = name.endswith("_n")
        if not (math.isfinite(value) and value > 0) or (integer and value != int(value)):
            kind = "a whole number above 0" if integer else "a number above 0"
            raise InputError(f"must be {kind}, got {value}", field=_option(name))
        out.append(float(value))
    if out[0] is None:
        raise InputError(
            f"the endpoint is {endpoint.outcome}: give {_option(endpoint.sizes[0])}",
            field=_option(endpoint.sizes[0]),
        )
    return tuple(out)


def _check_rule(spec: DesignSpec) -> float:
    if spec.better not in BETTER:
        raise InputError(f"must be higher or lower, got {spec.better!r}", field="--better")
    for name, value in (("--decide", spec.threshold), ("--futility", spec.futility)):
        if value is not None and not 0 < value < 1:
            raise InputError(f"must be a probability in (0, 1), got {value}", field=name)
    if spec.futility is not None and spec.futility >= spec.threshold:
        raise InputError("must be below the success threshold --decide", field="--futility")
    if not (math.isfinite(spec.margin) and spec.margin >= 0):
        raise InputError(f"must be a number >= 0, got {spec.margin}", field="--margin")
    if spec.alpha is not None and not 0 < spec.alpha < 0.5:
        raise InputError(f"must be in (0, 0.5), got {spec.alpha}", field="--alpha")
    if spec.calibrate not in CALIBRATE:
        raise InputError(f"must be central or worst, got {spec.calibrate!r}", field="--calibrate")
    return BETTER[spec.better]


_INSIDE = {
    "unit": (lambda v: 0 < v < 1, "strictly between 0 and 1"),
    "positive": (lambda v: v > 0, "above 0"),
    "real": (math.isfinite, "finite"),
}


def _check_truths(values: Sequence[float], support: str, field: str) -> None:
    inside, words = _INSIDE[support]
    bad = [v for v in values if not (math.isfinite(v) and inside(v))]
    if bad:
        raise InputError(f"values must be {words}; {bad[0]:g} is not", field=field)


def _default_truths(prior: Prior) -> tuple[float, ...]:
    """41 values over the prior median ± 3 interquartile ranges on the canonical scale (prior-
    data conflict on both sides), evenly spaced on the natural scale."""
    q = to_canonical(
        prior.support,
        [
            _quantile(prior.components, 0.25),
            _quantile(prior.components, 0.5),
            _quantile(prior.components, 0.75),
        ],
    )
    iqr = float(q[2] - q[0])
    lo, hi = from_canonical(prior.support, [q[1] - 3 * iqr, q[1] + 3 * iqr])
    return tuple(float(v) for v in np.linspace(float(lo), float(hi), 41))


def _treatment_prior(prior: Prior, spec: str, likelihood: str) -> tuple[Component, str]:
    try:
        vague = vague_component(prior, spec, likelihood=likelihood)
    except InputError as error:
        raise InputError(error.message, field="--treatment-prior") from None
    if vague.component.dist.conjugate != likelihood:
        raise InputError(
            f"the weakly informative prior must be conjugate to the {likelihood} likelihood "
            f"(a {prior.components[0].family}), got {vague.component.family}",
            field="--treatment-prior",
        )
    params = ", ".join(f"{k}={v:.4g}" for k, v in vague.component.params.items())
    return vague.component, f"{vague.component.family}({params}): {vague.description}"


def _prior_info(prior: Prior) -> dict[str, Any]:
    from registry.values.frozen import thaw

    return {
        "label": prior.label,
        "digest": prior.digest,
        "measure": prior.measure,
        "scale": prior.scale,
        "components": [c.to_dict() for c in prior.components],
        "ess": thaw(prior.ess),
        "stale": list(prior.stale),
    }


def _calibrate(engine: Any, nulls: tuple[Any, Any | None], alpha: float, at: str) -> Calibration:
    """The smallest grid threshold whose type I error (the largest over `nulls`) is <= alpha;
    the type I error falls as the threshold rises, so a bisection of the grid finds it."""

    def type1(c: float) -> float:
        return float(np.max(engine.success(c, nulls[0], nulls[1], "prior")))

    grid = THRESHOLDS
    if type1(grid[-1]) > alpha:
        return Calibration(
            None,
            None,
            None,
            None,
            at,
            f"even a threshold of {grid[-1]} has a type I error of {type1(grid[-1]):.4g} > {alpha}",
        )
    if type1(grid[0]) <= alpha:
        return Calibration(
            grid[0], type1(grid[0]), None, None, at, "the lowest threshold tried already holds"
        )
    lo, hi = 0, len(grid) - 1
    while hi - lo > 1:
        mid = (lo + hi) // 2
        lo, hi = (lo, mid) if type1(grid[mid]) <= alpha else (mid, hi)
    return Calibration(grid[hi], type1(grid[hi]), grid[lo], type1(grid[lo]), at)


def evaluate_design(prior: Prior, spec: DesignSpec, *, progress: Progress = _quiet) -> DesignResult:
    """Operating characteristics of `spec` with `prior` (see the module docstring)."""
    endpoint = _endpoint(prior)
    sizes = _sizes(spec, endpoint, prior.label, prior.measure)
    sign = _check_rule(spec)
    support = prior.support
    two_arm = len(sizes) > 1 and sizes[1] is not None
    notes: list[str] = []
    reference = spec.reference
    if two_arm and reference is not None:
        raise InputError("a two-arm design has no reference value", field="--reference")
    if not two_arm and reference is None:
        null = measure_row(prior.measure).null if prior.measure else None
        if endpoint.counts or null is None:
            raise InputError(
                f"give {_option(endpoint.sizes[1])} for two arms, or --reference for one arm"
                if endpoint.sizes[1]
                else "give --reference: the value the estimate must beat",
                field="--reference",
            )
        reference = null
    if not two_arm and spec.effects != (0.0,):
        raise InputError(
            "a one-arm design has no effect; its truths are the arm's own values (--truth)",
            field="--effect",
        )
    truths = spec.truths if spec.truths is not None else _default_truths(prior)
    _check_truths(truths, support, "--truth")
    if reference is not None:
        _check_truths([reference], support, "--reference")
    shift = endpoint.contrast.shift
    central = _quantile(prior.components, 0.5)

    # scenarios: (control, treatment, effect); a treatment value outside the support is left out
    scenarios: list[tuple[float, float | None, float | None]] = []
    for effect in spec.effects if two_arm else (None,):
        for t in truths:
            if effect is None:
                scenarios.append((t, None, None))
                continue
            value = float(shift(t, effect))
            if _INSIDE[support][0](value) or (support == "unit" and value in (0.0, 1.0)):
                scenarios.append((t, value, effect))
    if len(scenarios) < len(truths) * (len(spec.effects) if two_arm else 1):
        notes.append("scenarios whose treatment value falls outside the support are left out")
    if not scenarios:
        raise InputError(
            "every scenario's treatment value is outside the support", field="--effect"
        )

    alternatives = [e for e in spec.effects if e != 0] if two_arm else [None]
    q_hi = _quantile(prior.components, 1 - ASSURANCE_TAIL)
    design: dict[str, Any] = {
        "arms": 2 if two_arm else 1,
        "endpoint": endpoint.outcome,
        "likelihood": endpoint.likelihood,
        "sizes": {n: s for n, s in zip(endpoint.sizes, sizes, strict=False) if n},
        "contrast": endpoint.contrast.name if two_arm else None,
        "reference": reference,
        "decision_rule": {
            "better": spec.better,
            "margin": spec.margin,
            "threshold": spec.threshold,
            "futility": spec.futility,
            "success": (
                f"P(treatment {endpoint.contrast.name} "
                f"{'>' if sign > 0 else '<'} {sign * spec.margin + 0.0:g} | data) "
                f"> {spec.threshold}"
                if two_arm
                else f"P(value {'>' if sign > 0 else '<'} reference "
                f"{'+' if sign > 0 else '-'} {spec.margin:g} | data) > {spec.threshold}"
            ),
        },
        "treatment_prior": None,
        "without_borrowing": None,
    }
    if not endpoint.counts:
        boundary = float(reference) + sign * spec.margin
        engine: Any = _Normal(prior.components, sizes[0], boundary, sign)
        design["without_borrowing"] = "a flat prior: theta | y ~ N(y, se²)"
    else:
        vague, described = _treatment_prior(prior, spec.treatment_prior, endpoint.likelihood)
        design["treatment_prior" if two_arm else "without_borrowing"] = described
        if two_arm:
            design["without_borrowing"] = "the control arm gets the treatment arm's prior"
        largest_c = max(max(truths), central, q_hi)
        largest_t = max(
            [s[1] for s in scenarios if s[1] is not None]
            + [float(shift(q_hi, e)) for e in alternatives if e is not None],
            default=0.0,
        )
        engine = _Counts(
            endpoint,
            prior.components,
            (vague,),
            sizes,
            None if two_arm else float(shift(reference, sign * spec.margin)),
            sign,
            spec.margin,
            support,
            (largest_c, largest_t),
            progress,
        )
    control = np.array([s[0] for s in scenarios])
    treatment = np.array([s[1] for s in scenarios]) if two_arm else None

    results: dict[str, Any] = {}
    for key in ("prior", "vague"):
        results[f"success_{key}"] = engine.success(spec.threshold, control, treatment, key)
        results[f"bias_{key}"], results[f"rmse_{key}"] = engine.bias_rmse(control, key)
        if spec.futility is not None:
            results[f"futility_{key}"] = engine.futility(spec.futility, control, treatment, key)
    progress("scenarios", 0.95)

    calibration = None
    calibrated = None
    if spec.alpha is not None:
        if two_arm:
            nulls = (
                (np.array([central]), np.array([central]))
                if spec.calibrate == "central"
                else (np.asarray(truths), np.asarray(truths))
            )
            at = (
                f"the prior's median control value {central:.4g}, effect 0"
                if spec.calibrate == "central"
                else "the worst case over the scenarios' control values, effect 0"
            )
        else:
            worst = [t for t in truths if sign * (t - reference) <= 0]
            nulls = (np.array([reference] + (worst if spec.calibrate == "worst" else [])), None)
            at = f"the reference value {reference:g}" + (
                " and every scenario on the null side" if spec.calibrate == "worst" else ""
            )
        calibration = _calibrate(engine, nulls, spec.alpha, at)
        if calibration.threshold is not None:
            calibrated = engine.success(calibration.threshold, control, treatment, "prior")

    assurance = _assurance(engine, prior, spec.threshold, alternatives, shift, support)
    if assurance is None:
        notes.append("no assurance: give a non-zero --effect (the effect assumed when averaging)")

    omitted = engine.omitted(control, treatment)
    method = {
        "name": "exact",
        "how": (
            "normal tails beyond the cut-off y*"
            if not endpoint.counts
            else "every outcome enumerated once, weighted by each scenario's "
            f"{endpoint.likelihood} probabilities"
        ),
        "quadrature_error": engine.quadrature_error,
        "grid_points": getattr(engine, "grid_points", None),
        "truncation": {"tail_bound": POISSON_TAIL, "largest_omitted": omitted}
        if endpoint.truncated
        else None,
    }

    def pick(name: str, i: int) -> float | None:
        value = results.get(name)
        return None if value is None else float(value[i])

    rows = tuple(
        Scenario(
            control=float(c),
            treatment=t,
            effect=e,
            success=pick("success_prior", i),
            success_without_borrowing=pick("success_vague", i),
            bias=pick("bias_prior", i),
            rmse=pick("rmse_prior", i),
            bias_without_borrowing=pick("bias_vague", i),
            rmse_without_borrowing=pick("rmse_vague", i),
            futility=pick("futility_prior", i),
            futility_without_borrowing=pick("futility_vague", i),
            success_calibrated=None if calibrated is None else float(calibrated[i]),
        )
        for i, (c, t, e) in enumerate(scenarios)
    )
    progress("done", 1.0)
    return DesignResult(
        prior={**_prior_info(prior), "median": central},
        design=design,
        method=method,
        threshold=spec.threshold,
        scenarios=rows,
        calibrated_threshold=calibration,
        assurance=assurance,
        notes=tuple(notes),
        warnings=tuple(f"{prior.label} is stale: {r}" for r in prior.stale),
    )


def _assurance(
    engine: Any,
    prior: Prior,
    threshold: float,
    effects: Sequence[float | None],
    shift: Callable[[Any, float], Any],
    support: str,
) -> tuple[Assurance, ...] | None:
    """The probability of success averaged over the prior of the truth (O'Hagan et al. 2005):
    exactly through the prior predictive for a normal estimate; otherwise by quadrature over the
    prior between its ASSURANCE_TAIL quantiles on the canonical grid, the mass left out (and the
    outcomes truncated) added to the error bound."""
    if not effects:
        return None
    if isinstance(engine, _Normal):
        return (
            Assurance(
                None,  # type: ignore[arg-type]
                engine.assurance(threshold, "prior"),
                engine.assurance(threshold, "vague"),
                0.0,
            ),
        )
    phi = _canonical_grid([prior.components])
    (weights,), _ = _grid_weights([prior.components], phi)
    lo, hi = to_canonical(
        support,
        [
            _quantile(prior.components, ASSURANCE_TAIL),
            _quantile(prior.components, 1 - ASSURANCE_TAIL),
        ],
    )
    keep = (phi >= lo) & (phi <= hi) & (weights > 1e-16)
    control, weights = from_canonical(support, phi[keep]), weights[keep]
    out = []
    for effect in effects:
        treatment = None
        if effect is not None:
            treatment = shift(control, effect)
            if support == "unit":
                treatment = np.clip(treatment, 0.0, 1.0)
        bound = 1.0 - float(weights.sum()) + engine.omitted(control, treatment)
        out.append(
            Assurance(
                effect,  # type: ignore[arg-type]
                float(weights @ engine.success(threshold, control, treatment, "prior")),
                float(weights @ engine.success(threshold, control, treatment, "vague")),
                bound,
            )
        )
    return tuple(out)


def design_from_registry(
    ledger: Any, label: str, spec: DesignSpec, *, progress: Progress = _quiet
) -> DesignResult:
    """`evaluate_design` on the stored prior `NAME[@N]`; nothing is written to the registry."""
    from registry.priors.store import get_prior

    return evaluate_design(get_prior(ledger, label).prior, spec, progress=progress)
