"""Exact count likelihoods of a study's latent parameter theta, each declared by its parts.

A declaration gives what the shared machine of `registry.synthesis.count_models` needs: the
log-likelihood (up to a constant) and its first two derivatives in theta, the normal
approximation with the 0.5 correction that places the grids, the "information" that picks the
Gauss-Hermite order, and the checks of the data. Both likelihoods are concave in theta.

- binomial-logit: y ~ Bin(n, expit(theta)); log L = y theta - n log(1 + e^theta);
- Poisson-log with exposure E: y ~ Poisson(E e^theta); log L = y theta - E e^theta.

The normal approximations are the empirical logit log((y + 0.5)/(n - y + 0.5)) with variance
1/(y + 0.5) + 1/(n - y + 0.5), and the log rate log((y + 0.5)/E) with variance 1/(y + 0.5):
the 0.5 correction on every study (common practice).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import special

from registry.errors import InputError

Array = np.ndarray


@dataclass(frozen=True)
class CountLikelihood:
    """One count likelihood: its name, analysis scale, and its parts as functions.

    `loglik(theta, y, size)` and `derivatives(theta, y, size)` broadcast; `size` is the total
    (binomial) or the exposure (Poisson), named `size_name` in messages. `information(y, size)`
    is the count that governs how far the likelihood is from normal. `check(y, size)` raises
    `InputError` on impossible data; `proper_with_flat_mu(y, size)` says whether the posterior
    is proper under a flat prior on mu, which needs the likelihood of mu to vanish in both
    directions.
    """

    name: str
    scale: str
    size_name: str
    loglik: Callable[[Array, Array, Array], Array]
    derivatives: Callable[[Array, Array, Array], tuple[Array, Array]]
    normal_approx: Callable[[Array, Array], tuple[Array, Array]]
    information: Callable[[Array, Array], Array]
    check: Callable[[Array, Array], None]
    proper_with_flat_mu: Callable[[Array, Array], bool]


def _binomial_loglik(theta: Array, y: Array, n: Array) -> Array:
    # log(1 + e^t), exact in double precision below t = 700 (the nodes lie near data)
    capped = np.minimum(theta, 700.0)
    return y * theta - n * (np.log1p(np.exp(capped)) + (theta - capped))


def _binomial_derivatives(theta: Array, y: Array, n: Array) -> tuple[Array, Array]:
    p = special.expit(theta)
    return y - n * p, -n * p * (1 - p)


def _binomial_normal(y: Array, n: Array) -> tuple[Array, Array]:
    e, f = y + 0.5, n - y + 0.5
    return np.log(e / f), np.sqrt(1 / e + 1 / f)


def _binomial_check(y: Array, n: Array) -> None:
    if np.any(n != np.round(n)) or np.any(n < 1) or np.any(y > n):
        raise InputError("totals must be whole numbers >= 1 and >= events", field="totals")


def _binomial_proper(y: Array, n: Array) -> bool:
    interior = (y > 0) & (y < n)
    return bool(interior.any() or (np.any(y == 0) and np.any(y == n)))


def _poisson_loglik(theta: Array, y: Array, exposure: Array) -> Array:
    return y * theta - exposure * np.exp(theta)


def _poisson_derivatives(theta: Array, y: Array, exposure: Array) -> tuple[Array, Array]:
    rate = exposure * np.exp(theta)
    return y - rate, -rate


def _poisson_normal(y: Array, exposure: Array) -> tuple[Array, Array]:
    e = y + 0.5
    return np.log(e / exposure), np.sqrt(1 / e)


def _poisson_check(y: Array, exposure: Array) -> None:
    if np.any(exposure <= 0):
        raise InputError("exposures must be positive", field="exposures")


BINOMIAL_LOGIT = CountLikelihood(
    name="binomial",
    scale="logit",
    size_name="totals",
    loglik=_binomial_loglik,
    derivatives=_binomial_derivatives,
    normal_approx=_binomial_normal,
    information=lambda y, n: np.minimum(y, n - y),
    check=_binomial_check,
    proper_with_flat_mu=_binomial_proper,
)

POISSON_LOG = CountLikelihood(
    name="poisson",
    scale="log",
    size_name="exposures",
    loglik=_poisson_loglik,
    derivatives=_poisson_derivatives,
    normal_approx=_poisson_normal,
    information=lambda y, exposure: y,
    check=_poisson_check,
    proper_with_flat_mu=lambda y, exposure: bool(np.any(y > 0)),
)

LIKELIHOODS: dict[str, CountLikelihood] = {lik.name: lik for lik in (BINOMIAL_LOGIT, POISSON_LOG)}
