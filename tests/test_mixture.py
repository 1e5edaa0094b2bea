"""Mixture fits to tabulated densities: reference shapes come from scipy.stats (skewed,
heavy-tailed, bimodal) and from a predictive of the BCG control arms (Colditz et al. 1994,
JAMA 271:698; counts recalled from memory, as in test_bayes). Quantile errors are measured
here against scipy's own quantile functions, not against the module's error report alone."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import special, stats

from registry.errors import InputError
from registry.synthesis import fit_binomial
from registry.synthesis.mixture import ERROR_LEVELS, QUANTILE_ERROR_BOUND, fit_mixture
from registry.values.prior import Component

LEVELS = np.asarray(ERROR_LEVELS)


def mixture_ppf(components: tuple[Component, ...], q: float) -> float:
    from scipy.optimize import brentq

    def cdf(v):
        return sum(c.weight * c.dist.frozen().cdf(v) for c in components)

    return brentq(lambda v: cdf(v) - q, -100, 100, xtol=1e-12)


SHAPES = {
    "skewed": stats.skewnorm(4, loc=0, scale=2),
    "heavy-tailed": stats.t(5, loc=1, scale=0.5),
    "bimodal": None,  # 0.6 N(-2, 0.7²) + 0.4 N(2, 1.2²)
}


@pytest.mark.parametrize("shape", list(SHAPES))
def test_normal_mixture_quantile_error_is_within_the_bound(shape):
    x = np.linspace(-12, 14, 1201)
    if shape == "bimodal":
        dens = 0.6 * stats.norm.pdf(x, -2, 0.7) + 0.4 * stats.norm.pdf(x, 2, 1.2)
        truth = [
            Component("normal", {"loc": -2, "scale": 0.7}, 0.6),
            Component("normal", {"loc": 2, "scale": 1.2}, 0.4),
        ]
        true_q = np.array([mixture_ppf(tuple(truth), q) for q in LEVELS])
        sd = np.sqrt(0.6 * (0.49 + 4) + 0.4 * (1.44 + 4) - (0.6 * -2 + 0.4 * 2) ** 2)
    else:
        dist = SHAPES[shape]
        dens, true_q, sd = dist.pdf(x), dist.ppf(LEVELS), dist.std()
    fit = fit_mixture(x, dens, "normal", max_components=4)
    got = np.array([mixture_ppf(fit.components, q) for q in LEVELS])
    assert np.max(np.abs(got - true_q)) / sd < QUANTILE_ERROR_BOUND
    assert fit.error["quantile_relative"] < QUANTILE_ERROR_BOUND
    assert fit.error["kl"] >= -1e-9
    if shape == "bimodal":
        assert fit.n_components >= 2


def test_one_normal_is_recovered_exactly_enough():
    x = np.linspace(-8, 10, 801)
    fit = fit_mixture(x, stats.norm.pdf(x, 1, 1.5))
    assert fit.n_components == 1
    assert fit.components[0].params["loc"] == pytest.approx(1, abs=1e-3)
    assert fit.components[0].params["scale"] == pytest.approx(1.5, rel=1e-3)


def test_beta_mixture_on_the_logit_scale_recovers_a_beta():
    x = np.linspace(-9, 3, 801)
    p = special.expit(x)
    dens = stats.beta.pdf(p, 3, 20) * p * (1 - p)  # the Beta(3, 20) density of logit p
    fit = fit_mixture(x, dens, "beta", max_components=2)
    c = fit.components[0]
    assert fit.n_components == 1
    assert c.params["a"] == pytest.approx(3, rel=0.01)
    assert c.params["b"] == pytest.approx(20, rel=0.01)


def test_gamma_mixture_on_the_log_scale_recovers_a_gamma():
    x = np.linspace(-7, 3, 801)
    r = np.exp(x)
    dens = stats.gamma.pdf(r, 4, scale=0.1) * r
    fit = fit_mixture(x, dens, "gamma", max_components=2)
    assert fit.n_components == 1
    assert fit.components[0].params["a"] == pytest.approx(4, rel=0.01)
    assert fit.components[0].params["scale"] == pytest.approx(0.1, rel=0.01)


def test_mixture_of_a_bayes_predictive_meets_the_bound():
    events = np.array([11, 29, 11, 248, 47, 372, 10, 499, 45, 65, 141, 3, 29])
    totals = np.array(
        [139, 303, 220, 12867, 5808, 1451, 629, 88391, 7277, 1665, 27338, 2341, 17854]
    )
    pred = fit_binomial(events, totals, "half-t:1,3").predictive
    fit = fit_mixture(pred.x, pred.density, "normal")
    got = np.array([mixture_ppf(fit.components, q) for q in LEVELS])
    assert np.max(np.abs(got - pred.ppf(LEVELS))) / pred.sd < QUANTILE_ERROR_BOUND


def test_bad_input_is_rejected():
    with pytest.raises(InputError):
        fit_mixture([0, 1, 2], [1, 1, 1])
    with pytest.raises(InputError):
        fit_mixture(np.linspace(0, 1, 20), np.ones(20), "cauchy")


def test_column_logsumexp_is_scipys() -> None:
    """The column-wise log-sum-exp of EM and of the ESS integrand takes scipy's own steps,
    so it gives scipy.special.logsumexp(axis=0) exactly, with ties, -inf and +inf too."""
    from registry.synthesis.mixture import column_logsumexp

    rng = np.random.default_rng(3)
    for _ in range(300):
        j, g = int(rng.integers(1, 6)), int(rng.integers(1, 40))
        x = rng.normal(0, rng.choice([1.0, 50.0, 800.0]), (j, g))
        x[rng.random((j, g)) < 0.1] = -np.inf
        x[:, 0] = -np.inf if rng.random() < 0.3 else x[-1, 0]
        if rng.random() < 0.1:
            x[0, -1] = np.inf
        with np.errstate(all="ignore"):
            np.testing.assert_array_equal(column_logsumexp(x), special.logsumexp(x, axis=0))
