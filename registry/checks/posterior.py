"""The exact posterior of a prior after one new study, and how its component weights moved.

Where every component is conjugate to the study's likelihood the posterior is the mixture of
the updated components with weights proportional to w_j m_j(data), m_j the marginal
likelihood (`registry.priors.update.update`; e.g. Beta(a + x, b + n - x), common practice).
Otherwise each component's posterior is computed by numerical integration on its canonical
coordinate (`registry.checks.grid`): the same weights, with m_j = integral of p_j(phi) L(phi),
and summaries from the posterior density on the grid; the accuracy is the largest change of
the summaries (relative to the posterior sd) and of the weights when the grid's points double.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from registry.checks.grid import POINTS, Grid, log_likelihood
from registry.checks.predictive import QUANTILES
from registry.checks.study import Study
from registry.values.families import from_canonical
from registry.values.prior import Prior


@dataclass(frozen=True)
class Summary:
    """Mean, sd and the 2.5/50/97.5% quantiles of a distribution on the prior's scale."""

    mean: float
    sd: float | None
    quantiles: tuple[float, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "mean": self.mean,
            "sd": self.sd,
            "quantiles": {str(q): v for q, v in zip(QUANTILES, self.quantiles, strict=True)},
        }


@dataclass(frozen=True)
class Posterior:
    """The posterior: its components (closed form where conjugate, else numerical summaries),
    weights before and after, summaries, the method and its accuracy, curves for a plot."""

    scale: str
    components: tuple[dict[str, Any], ...]
    prior_weights: tuple[float, ...]
    weights: tuple[float, ...]
    summary: Summary
    method: str
    accuracy: float | None
    theta: Any = field(repr=False)
    prior_density: Any = field(repr=False)
    likelihood: Any = field(repr=False)
    density: Any = field(repr=False)
    mass: Any = field(repr=False)
    exact: Prior | None = field(default=None, repr=False)

    def probability_above(self, x: float) -> float:
        """P(theta > x | data) on the prior's scale."""
        if self.exact is not None:
            return float(1.0 - self.exact.cdf(x))
        return float(self.mass @ (self.theta > x))


def _conjugate(prior: Prior, study: Study) -> tuple[tuple[dict[str, Any], ...], tuple, Prior]:
    from registry.priors.update import update

    mixture = update(prior.components, study.result, study.size)
    # `update` leaves out components whose weight underflows; keep the prior's shape
    kept = list(mixture)
    components, weights = [], []
    for c in prior.components:
        dist = c.dist.update(study.result, study.size)[0]
        weight = kept.pop(0).weight if kept and kept[0].dist == dist else 0.0
        components.append({"weight": weight, "family": dist.name, **dist.params})
        weights.append(weight)
    return tuple(components), tuple(weights), Prior.candidate(prior.scale, mixture)


@dataclass(frozen=True)
class _OnGrid:
    weights: Any
    log_post: Any  # per component, normalised
    grid: Grid
    summary: Summary
    parts: tuple[dict[str, Any], ...]


def _on_grid(prior: Prior, study: Study, points: int) -> _OnGrid:
    import numpy as np
    from scipy.special import logsumexp, softmax

    grid = Grid.around([c.dist for c in prior.components], study, points)
    loglik = log_likelihood(study, grid.phi)
    log_prior = [grid.log_density(c.dist) for c in prior.components]
    log_m = np.array([logsumexp(lp + loglik + grid.log_w) for lp in log_prior])
    weights = softmax(np.log([c.weight for c in prior.components]) + log_m)
    log_post = [lp + loglik - m for lp, m in zip(log_prior, log_m, strict=True)]
    support = prior.components[0].support
    theta = from_canonical(support, grid.phi)
    parts = []
    for c, w, lp in zip(prior.components, weights, log_post, strict=True):
        mass = grid.probabilities(lp)
        mean = float(mass @ theta)
        parts.append(
            {
                "weight": float(w),
                "family": c.family,
                "form": "numerical (no closed-form posterior in this family)",
                "mean": mean,
                "sd": math.sqrt(float(mass @ (theta - mean) ** 2)),
            }
        )
    mixture = logsumexp(np.stack(log_post), axis=0, b=weights[:, None])
    mass = grid.probabilities(mixture)
    mean = float(mass @ theta)
    quantiles = tuple(float(from_canonical(support, grid.quantile(mixture, q))) for q in QUANTILES)
    summary = Summary(mean, math.sqrt(float(mass @ (theta - mean) ** 2)), quantiles)
    return _OnGrid(weights, log_post, grid, summary, tuple(parts))


def _accuracy(fine: _OnGrid, coarse: _OnGrid) -> float:
    """Largest change on halving the grid: of mean and quantiles in posterior sds, and of the
    weights."""
    a, b = fine.summary, coarse.summary
    scale = a.sd or 1.0
    moved = [abs(a.mean - b.mean) / scale, abs((a.sd or 0) - (b.sd or 0)) / scale]
    moved += [abs(x - y) / scale for x, y in zip(a.quantiles, b.quantiles, strict=True)]
    moved += [abs(x - y) for x, y in zip(fine.weights, coarse.weights, strict=True)]
    return max(moved)


def posterior(prior: Prior, study: Study) -> Posterior:
    """The posterior of `prior` after the observed `study` (see the module docstring)."""
    import numpy as np
    from scipy.special import logsumexp

    fine = _on_grid(prior, study, 2 * POINTS)
    support = prior.components[0].support
    theta = np.asarray(from_canonical(support, fine.grid.phi))
    # densities on the prior's scale: p(theta) = p(phi) / (d theta / d phi)
    jacobian = np.log(np.maximum(np.gradient(theta, fine.grid.phi), 1e-300))
    log_prior = logsumexp(
        np.stack([fine.grid.log_density(c.dist) for c in prior.components]),
        axis=0,
        b=np.array([c.weight for c in prior.components])[:, None],
    )
    loglik = log_likelihood(study, fine.grid.phi)
    mixture = logsumexp(np.stack(fine.log_post), axis=0, b=fine.weights[:, None])
    curves = {
        "theta": theta,
        "prior_density": np.exp(log_prior - jacobian),
        "likelihood": np.exp(loglik - loglik.max()),
        "density": np.exp(mixture - jacobian),
        "mass": fine.grid.probabilities(mixture),
    }
    weights_before = tuple(c.weight for c in prior.components)
    if all(c.dist.conjugate == study.likelihood for c in prior.components):
        components, weights, exact = _conjugate(prior, study)
        summary = Summary(
            exact.mean(), math.sqrt(exact.var()), tuple(exact.ppf(q) for q in QUANTILES)
        )
        return Posterior(
            prior.scale,
            components,
            weights_before,
            weights,
            summary,
            "exact: conjugate update of each component, weights by marginal likelihood",
            0.0,
            exact=exact,
            **curves,
        )
    coarse = _on_grid(prior, study, POINTS)
    return Posterior(
        prior.scale,
        fine.parts,
        weights_before,
        tuple(float(w) for w in fine.weights),
        fine.summary,
        f"numerical integration: trapezoid rule on {len(fine.grid.phi)} points of the "
        "canonical scale, accuracy = largest change when the points are halved",
        _accuracy(fine, coarse),
        **curves,
    )


BOX_METHOD = (
    "Box (1980) prior predictive tail probability of the observed result, two-sided: "
    "min(1, 2 min(P(Y <= y), P(Y >= y))) under the prior predictive"
)


@dataclass(frozen=True)
class Conflict:
    p_value: float
    level: float | None
    method: str = BOX_METHOD

    @property
    def conflict(self) -> bool:
        return self.level is not None and self.p_value < self.level

    def to_dict(self) -> dict[str, Any]:
        return {
            "p_value": self.p_value,
            "method": self.method,
            "level": self.level,
            "conflict": self.conflict,
        }


@dataclass(frozen=True)
class Update:
    """What `priorledger update` reports: the posterior, the weights and the conflict check."""

    prior: str
    study: Study
    posterior: Posterior
    conflict: Conflict
    predictive_method: str
    warnings: tuple[str, ...] = ()
    predictive_accuracy: float = 0.0

    def to_dict(self) -> dict[str, Any]:
        from registry.caution import CAUTION

        p = self.posterior
        return {
            "prior": self.prior,
            "data": self.study.to_dict(),
            "posterior": {
                "scale": p.scale,
                "components": list(p.components),
                **p.summary.to_dict(),
                "method": p.method,
                "accuracy": p.accuracy,
            },
            "weights": {"prior": list(p.prior_weights), "posterior": list(p.weights)},
            "conflict": {
                **self.conflict.to_dict(),
                "predictive": self.predictive_method,
                "predictive_accuracy": self.predictive_accuracy,
            },
            "warnings": list(self.warnings),
            "caution": CAUTION,
        }


def check_against(prior: Prior, study: Study, level: float | None) -> tuple[Conflict, str, float]:
    """Box's tail probability of the study's result, how the predictive was computed and its
    accuracy (it bounds the change of any cumulative probability; the two-sided tail probability
    moves by at most twice that)."""
    from registry.checks.predictive import predictive, tail_probability

    dist = predictive(prior, Study(study.likelihood, study.size))
    return Conflict(tail_probability(dist, study.result), level), dist.method, dist.accuracy


def update_prior(
    ledger: Any,
    label: str,
    *,
    events: float | None = None,
    n: float | None = None,
    exposure: float | None = None,
    estimate: float | None = None,
    se: float | None = None,
    conflict_level: float | None = None,
) -> Update:
    """The posterior of the stored prior `label` after new data, with the conflict check at
    `conflict_level` (if given). Nothing is written."""
    from registry.checks.load import load
    from registry.checks.study import observed
    from registry.errors import InputError

    if conflict_level is not None and not 0 < conflict_level < 1:
        raise InputError(f"must be in (0, 1), got {conflict_level}", field="--conflict-level")
    loaded = load(ledger, label)
    study = observed(
        loaded.measure, events=events, n=n, exposure=exposure, estimate=estimate, se=se
    )
    prior = loaded.stored.prior
    conflict, method, accuracy = check_against(prior, study, conflict_level)
    return Update(
        prior.label, study, posterior(prior, study), conflict, method, loaded.warnings, accuracy
    )
