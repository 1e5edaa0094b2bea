"""The prior predictive distribution of a planned study's result.

For counts it is exact where the family is conjugate: a mixture of beta-binomials for a beta
prior and binomial data, of negative binomials (n = a, p = b / (b + E), b the gamma rate) for a
gamma prior and Poisson data (common practice; e.g. Gelman et al., *Bayesian Data Analysis*,
3rd ed., ch. 2). For an estimate with standard error S on the analysis scale, a normal
component N(m, s²) predicts N(m, s² + S²) (the closed form). Other families (Student-t,
log-normal, normal priors for counts on the logit or log scale) are integrated numerically on
their canonical coordinate (`registry.checks.grid`), with the accuracy stated: the largest
change when the grid's points are halved, of the mean and sd (in predictive sds) and of the
cumulative probability anywhere (the trapezoid rule's error check, common practice; the same
check as the posterior's). Closed forms have accuracy 0.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field, replace
from functools import cached_property
from typing import Any

from registry.checks.grid import POINTS, Grid
from registry.checks.study import Study
from registry.errors import NumericalError
from registry.values.prior import Prior

# upper tail left out of a count predictive with no upper end (Poisson data)
TAIL = 1e-13
# the most counts a predictive is tabulated for
MAX_COUNT = 2_000_000
QUANTILES = (0.025, 0.5, 0.975)
EXACT = "exact"


def _count_pmf(prior: Prior, study: Study, points: int) -> tuple[Any, Any, str]:
    """k = 0..kmax and the mixture's probabilities; how each component's were computed."""
    import numpy as np

    from registry.values.families import from_canonical

    numerical = [c for c in prior.components if c.dist.conjugate != study.likelihood]
    grids = {id(c): Grid.around([c.dist], None, points) for c in numerical}
    if study.observation.bounded:
        kmax = int(study.size)
    else:
        tops = [
            float(c.dist.predictive(study.size).ppf(1 - TAIL))
            for c in prior.components
            if c not in numerical
        ]
        tops += [
            study.observation.quantile(1 - TAIL, study.size, float(g.phi[-1]))
            for g in grids.values()
        ]
        kmax = max(tops)
        if not math.isfinite(kmax) or kmax > MAX_COUNT:
            raise NumericalError(
                f"the predictive count has too heavy an upper tail to tabulate (its "
                f"{1 - TAIL:.13g} quantile is beyond {MAX_COUNT}); the prior's rate has "
                "(nearly) no finite moments"
            )
        kmax = int(kmax)
    k = np.arange(kmax + 1)
    pmf = np.zeros(kmax + 1)
    for c in prior.components:
        if c not in numerical:
            pmf += c.weight * c.dist.predictive(study.size).pmf(k)
            continue
        g = grids[id(c)]
        mass = g.probabilities(g.log_density(c.dist))
        # phi is the analysis scale: logit of the probability, log of the rate
        theta = from_canonical(study.observation.natural_support, g.phi)
        for start in range(0, kmax + 1, 20_000):
            block = k[start : start + 20_000]
            table = study.observation.pmf(block[None, :], study.size, theta[:, None])
            pmf[start : start + 20_000] += c.weight * (mass @ table)
    method = (
        EXACT
        if not numerical
        else f"numerical integration over {', '.join(sorted({c.family for c in numerical}))} "
        "components (trapezoid rule on the canonical scale)"
    )
    return k, pmf, method


@dataclass(frozen=True)
class CountPredictive:
    """Events of a planned study: the probability of each count k = 0..kmax."""

    study: Study
    k: Any = field(repr=False)
    pmf: Any = field(repr=False)
    method: str
    accuracy: float = 0.0

    @cached_property
    def cdf_table(self) -> Any:
        import numpy as np

        return np.minimum(np.cumsum(self.pmf), 1.0)

    @property
    def mean(self) -> float:
        return float(self.k @ self.pmf)

    @property
    def sd(self) -> float | None:
        return math.sqrt(max(float((self.k - self.mean) ** 2 @ self.pmf), 0.0))

    def quantile(self, q: float) -> float:
        import numpy as np

        return float(self.k[min(int(np.searchsorted(self.cdf_table, q)), len(self.k) - 1)])

    def below(self, x: float) -> float:
        """P(Y <= x)."""
        return float(self.cdf_table[int(x)]) if x < len(self.k) else 1.0

    def above(self, x: float) -> float:
        """P(Y >= x)."""
        return 1.0 - (self.below(x - 1) if x >= 1 else 0.0)

    def between(self, lo: float, hi: float) -> float:
        """P(lo <= Y <= hi) for real bounds."""
        inside = (self.k >= lo) & (self.k <= hi)
        return float(self.pmf[inside].sum())

    def curve(self) -> tuple[Any, Any]:
        return self.k, self.pmf


@dataclass(frozen=True)
class _EstimatePart:
    """One component's predictive of an estimate: closed-form normal or a grid convolution."""

    weight: float
    mean: float
    var: float  # of the parameter on the analysis scale, before the study's se
    closed: Any = None
    phi: Any = None
    mass: Any = None

    def cdf(self, y: Any, se: float) -> Any:
        import numpy as np
        from scipy import special

        if self.closed is not None:
            return self.closed.cdf(y)
        y = np.atleast_1d(np.asarray(y, dtype=float))
        return special.ndtr((y[:, None] - self.phi[None, :]) / se) @ self.mass

    def pdf(self, y: Any, se: float) -> Any:
        import numpy as np
        from scipy import stats

        if self.closed is not None:
            return self.closed.pdf(y)
        y = np.atleast_1d(np.asarray(y, dtype=float))
        return stats.norm.pdf(y[:, None], self.phi[None, :], se) @ self.mass


def _estimate_part(component: Any, study: Study, points: int) -> _EstimatePart:
    """Normal components in closed form; others on their grid. Moments of the parameter on the
    analysis scale: scipy's for real-valued families (inf or nan where they do not exist),
    else the grid's."""
    import numpy as np

    dist, se = component.dist, study.size
    if dist.conjugate == study.likelihood:
        return _EstimatePart(component.weight, dist.mean(), dist.var(), dist.predictive(se))
    g = Grid.around([dist], None, points)
    mass = g.probabilities(g.log_density(dist))
    if dist.support == "real":
        mean, var = dist.mean(), dist.var()
    else:
        mean = float(mass @ g.phi)
        var = float(mass @ (g.phi - mean) ** 2)
    return _EstimatePart(component.weight, mean, var, None, np.asarray(g.phi), mass)


@dataclass(frozen=True)
class EstimatePredictive:
    """An estimate with standard error S: y = theta + e, e ~ N(0, S²), theta from the prior."""

    study: Study
    parts: tuple[_EstimatePart, ...] = field(repr=False)
    method: str
    accuracy: float = 0.0

    @property
    def mean(self) -> float:
        return math.fsum(p.weight * p.mean for p in self.parts)

    @property
    def sd(self) -> float | None:
        """Law of total variance; None where a component has no finite variance."""
        m = self.mean
        if not math.isfinite(m):
            return None
        s2 = self.study.size**2
        var = math.fsum(p.weight * (p.var + s2 + (p.mean - m) ** 2) for p in self.parts)
        return math.sqrt(var) if math.isfinite(var) else None

    def below(self, y: float) -> float:
        import numpy as np

        return float(np.squeeze(sum(p.weight * p.cdf(y, self.study.size) for p in self.parts)))

    def above(self, y: float) -> float:
        return 1.0 - self.below(y)

    def between(self, lo: float, hi: float) -> float:
        return self.below(hi) - self.below(lo)

    def quantile(self, q: float) -> float:
        from scipy.optimize import brentq

        wide = 40.0 * self.study.size
        lo = min(float(p.closed.ppf(1e-12)) if p.closed else p.phi[0] for p in self.parts) - wide
        hi = max(float(p.closed.ppf(1 - 1e-12)) if p.closed else p.phi[-1] for p in self.parts)
        return float(brentq(lambda y: self.below(y) - q, lo, hi + wide, xtol=1e-10))

    def curve(self) -> tuple[Any, Any]:
        import numpy as np

        x = np.linspace(self.quantile(0.001), self.quantile(0.999), 400)
        return x, sum(p.weight * p.pdf(x, self.study.size) for p in self.parts)


def _predictive(prior: Prior, study: Study, points: int) -> CountPredictive | EstimatePredictive:
    if not study.observation.counts:
        parts = tuple(_estimate_part(c, study, points) for c in prior.components)
        numerical = sorted(
            {c.family for c in prior.components if c.dist.conjugate != study.likelihood}
        )
        method = (
            "closed form: normal, N(m, s² + S²) per component"
            if not numerical
            else f"numerical integration over {', '.join(numerical)} components "
            "(trapezoid rule on the analysis scale)"
        )
        return EstimatePredictive(study, parts, method)
    k, pmf, method = _count_pmf(prior, study, points)
    if method == EXACT:
        method = f"exact: a mixture of {study.observation.exact_predictive}"
    return CountPredictive(study, k, pmf, method)


def _accuracy(
    fine: CountPredictive | EstimatePredictive, coarse: CountPredictive | EstimatePredictive
) -> float:
    """Largest change from `coarse` to `fine`: of the mean and sd in predictive sds, and of the
    cumulative probability at every count (or at 400 points across the estimate's range)."""
    import numpy as np

    scale = fine.sd or 1.0
    moved = [abs(fine.mean - coarse.mean) / scale, abs((fine.sd or 0) - (coarse.sd or 0)) / scale]
    if isinstance(fine, CountPredictive):
        top = max(len(fine.k), len(coarse.k))
        cdfs = [
            np.pad(d.cdf_table, (0, top - len(d.k)), constant_values=1.0) for d in (fine, coarse)
        ]
        moved.append(float(np.max(np.abs(cdfs[0] - cdfs[1]))))
    else:
        y = fine.curve()[0]
        moved.append(max(abs(fine.below(v) - coarse.below(v)) for v in y))
    return max(moved)


def predictive(prior: Prior, study: Study) -> CountPredictive | EstimatePredictive:
    """The prior predictive of `study`'s result under `prior` (see the module docstring)."""
    fine = _predictive(prior, study, POINTS)
    if all(c.dist.conjugate == study.likelihood for c in prior.components):
        return fine
    coarse = _predictive(prior, study, POINTS // 2)
    return replace(
        fine,
        accuracy=_accuracy(fine, coarse),
        method=f"{fine.method}, accuracy = largest change when the points are halved",
    )


def tail_probability(dist: CountPredictive | EstimatePredictive, observed: float) -> float:
    """Box (1980, JRSS A 143:383) prior predictive check, two-sided:
    min(1, 2 min(P(Y <= y), P(Y >= y))) for the observed result y."""
    return min(1.0, 2.0 * min(dist.below(observed), dist.above(observed)))


@dataclass(frozen=True)
class Prediction:
    """What `priorledger predict` reports: the predictive's summaries for one planned study."""

    prior: str
    study: Study
    distribution: CountPredictive | EstimatePredictive = field(repr=False)
    plausible_range: tuple[float, float] | None
    warnings: tuple[str, ...] = ()

    @property
    def plausible(self) -> float | None:
        if self.plausible_range is None:
            return None
        return self.distribution.between(*self.plausible_range)

    def to_dict(self) -> dict[str, Any]:
        from registry.caution import CAUTION

        d = self.distribution
        return {
            "prior": self.prior,
            "design": self.study.to_dict(),
            "outcome": self.study.terms.outcome,
            "mean": d.mean,
            "sd": d.sd,
            "quantiles": {str(q): d.quantile(q) for q in QUANTILES},
            "plausible": self.plausible,
            "plausible_range": None if self.plausible_range is None else list(self.plausible_range),
            "method": d.method,
            "accuracy": d.accuracy,
            "warnings": list(self.warnings),
            "caution": CAUTION,
        }


def predict(
    ledger: Any,
    label: str,
    *,
    n: float | None = None,
    exposure: float | None = None,
    se: float | None = None,
) -> Prediction:
    """The prior predictive of a planned study of size `n`, `exposure` or `se` (whichever the
    prior's measure takes) under the stored prior `label`. Nothing is written."""
    from registry.checks.load import load, plausible_range
    from registry.checks.study import planned

    loaded = load(ledger, label)
    study = planned(loaded.measure, n=n, exposure=exposure, se=se)
    prior = loaded.stored.prior
    return Prediction(
        prior.label,
        study,
        predictive(prior, study),
        plausible_range(loaded.stored, study),
        loaded.warnings,
    )
