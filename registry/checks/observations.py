"""How one new study's result relates to the prior's parameter phi on its analysis scale.

One row per likelihood; the checks look a study's likelihood up here instead of testing its
name. Formulas are the standard ones (common practice): binomial-logit, Poisson-log with an
exposure, and a normal estimate with known standard error.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any


def _binomial_log_likelihood(x: float, n: float, phi: Any) -> Any:
    """log C(n, x) + x log p + (n - x) log(1 - p), p = expit(phi)."""
    import numpy as np
    from scipy import special

    log_c = special.gammaln(n + 1) - special.gammaln(x + 1) - special.gammaln(n - x + 1)
    return log_c - x * np.logaddexp(0.0, -phi) - (n - x) * np.logaddexp(0.0, phi)


def _poisson_log_likelihood(x: float, exposure: float, phi: Any) -> Any:
    """x log(E lambda) - E lambda - log x!, lambda = exp(phi)."""
    import numpy as np
    from scipy import special

    return x * (phi + math.log(exposure)) - exposure * np.exp(phi) - special.gammaln(x + 1)


def _normal_log_likelihood(y: float, se: float, phi: Any) -> Any:
    from scipy import stats

    return stats.norm.logpdf(y, phi, se)


def _binomial_window(x: float, n: float) -> tuple[float, float]:
    p = (x + 0.5) / (n + 1.0)
    return math.log(p / (1.0 - p)), 1.0 / math.sqrt((n + 1.0) * p * (1.0 - p))


def _poisson_window(x: float, exposure: float) -> tuple[float, float]:
    return math.log((x + 0.5) / exposure), 1.0 / math.sqrt(x + 0.5)


def _binomial_pmf(k: Any, n: float, p: Any) -> Any:
    from scipy import stats

    return stats.binom.pmf(k, int(n), p)


def _poisson_pmf(k: Any, exposure: float, rate: Any) -> Any:
    from scipy import stats

    return stats.poisson.pmf(k, exposure * rate)


def _poisson_quantile(q: float, exposure: float, phi: float) -> float:
    from scipy import stats

    return float(stats.poisson.ppf(q, exposure * math.exp(phi)))


@dataclass(frozen=True)
class Observation:
    """A likelihood for one study: its full log likelihood in phi (constants kept, so that
    components of different families compare), the likelihood's centre and width in phi (with
    half an event added, so that zero counts have a finite window), and for counts the support
    of the natural parameter, whether the count has an upper bound (n) and its probabilities."""

    name: str
    log_likelihood: Callable[[float, float, Any], Any]
    window: Callable[[float, float], tuple[float, float]]
    counts: bool
    bounded: bool = False  # the count cannot exceed the size (a binomial n)
    natural_support: str = "real"
    pmf: Callable[[Any, float, Any], Any] | None = None
    # for an unbounded count: its q-quantile given the size and phi
    quantile: Callable[[float, float, float], float] | None = None
    exact_predictive: str = "normals"


OBSERVATIONS: dict[str, Observation] = {
    o.name: o
    for o in (
        Observation(
            "binomial",
            _binomial_log_likelihood,
            _binomial_window,
            counts=True,
            bounded=True,
            natural_support="unit",
            pmf=_binomial_pmf,
            exact_predictive="beta-binomials",
        ),
        Observation(
            "poisson",
            _poisson_log_likelihood,
            _poisson_window,
            counts=True,
            natural_support="positive",
            pmf=_poisson_pmf,
            quantile=_poisson_quantile,
            exact_predictive="negative binomials",
        ),
        Observation(
            "normal", _normal_log_likelihood, lambda y, se: (float(y), float(se)), counts=False
        ),
    )
}
