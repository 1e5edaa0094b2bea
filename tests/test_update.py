"""Robust mixtures and conjugate mixture updates.

References: Schmidli et al. (2014, Biometrics 70:1023) for the robust mixture and its
behaviour under prior-data conflict (the vague weight rises); the posterior weights and
moments are checked against numerical integration with scipy.integrate.quad of prior x
likelihood, written here, with scipy's densities and probability mass functions.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import integrate, special, stats

from registry.errors import InputError
from registry.priors.update import update, vague_component, with_vague_component
from registry.values.prior import Component, Prior


def unit_information_component(mean: float, unit_sd, family: str, scale: str, likelihood=None):
    """The default vague component for a one-component prior of `family` with this mean."""
    informative = {
        "normal": lambda: Component("normal", {"loc": mean, "scale": 0.1}),
        "beta": lambda: Component("beta", {"a": 10 * mean, "b": 10 * (1 - mean)}),
        "gamma": lambda: Component("gamma", {"a": 10.0, "scale": mean / 10}),
    }[family]()
    if likelihood is None:
        likelihood = {"probability": "binomial", "rate": "poisson", "logit": "binomial"}.get(
            scale, "normal"
        )
    return vague_component(
        Prior.candidate(scale, (informative,)), likelihood=likelihood, unit_sd=unit_sd
    ).component


def _quad_posterior(components, log_lik, lo: float, hi: float, points=None):
    """Posterior component weights, mean and variance by quad over theta."""

    def joint(j: int, power: int):
        c = components[j]
        dist = c.dist.frozen()
        return integrate.quad(
            lambda t: t**power * math.exp(math.log(c.weight) + dist.logpdf(t) + log_lik(t)),
            lo,
            hi,
            points=points,
            limit=400,
            epsabs=0,
            epsrel=1e-11,
        )[0]

    mass = [joint(j, 0) for j in range(len(components))]
    total = sum(mass)
    mean = sum(joint(j, 1) for j in range(len(components))) / total
    second = sum(joint(j, 2) for j in range(len(components))) / total
    return [m / total for m in mass], mean, second - mean**2


def _mixture_moments(components) -> tuple[float, float]:
    mean = sum(c.weight * c.dist.frozen().mean() for c in components)
    second = sum(
        c.weight * (c.dist.frozen().var() + c.dist.frozen().mean() ** 2) for c in components
    )
    return mean, second - mean**2


# --- with_vague_component ---------------------------------------------------------


def test_with_vague_component_weights() -> None:
    informative = (
        Component("normal", {"loc": 0.2, "scale": 0.1}, 0.3),
        Component("normal", {"loc": 0.5, "scale": 0.2}, 0.7),
    )
    vague = unit_information_component(0.41, 2.0, "normal", "identity")
    mixed = with_vague_component(informative, vague, 0.25)
    assert [c.weight for c in mixed] == pytest.approx([0.75 * 0.3, 0.75 * 0.7, 0.25])
    assert mixed[-1].params == vague.params
    assert with_vague_component(informative, vague, 0.0) == informative
    for bad in (1.0, -0.1, math.nan):
        with pytest.raises(InputError):
            with_vague_component(informative, vague, bad)
    with pytest.raises(InputError):
        with_vague_component(informative, Component("beta", {"a": 0.5, "b": 0.5}), 0.2)


def test_default_vague_components() -> None:
    """One unit of data at the prior mean on an analysis scale: normal sd s_u; on logit,
    s_u^2 = 1/(p(1-p)) (one Bernoulli trial); on a log rate, sd 1 (one expected event: the
    information about log lambda in exposure E is lambda E). Natural scales: the uniform
    Beta(1, 1), and the exponential Gamma(1, scale m). Fisher information of a Bernoulli
    trial and of Poisson counts: common practice."""
    c = unit_information_component(0.3, 2.5, "normal", "identity")
    assert c.params == {"loc": 0.3, "scale": 2.5}
    c = unit_information_component(-1.2, None, "normal", "logit")
    p = special.expit(-1.2)
    assert c.params["scale"] == pytest.approx(1 / math.sqrt(p * (1 - p)))
    c = unit_information_component(math.log(0.4), None, "normal", "log", likelihood="poisson")
    assert c.params["scale"] == pytest.approx(1.0)
    c = unit_information_component(0.3, None, "beta", "probability")
    assert c.params == {"a": 1.0, "b": 1.0}
    c = unit_information_component(0.7, None, "gamma", "rate")
    assert c.dist.frozen().mean() == pytest.approx(0.7)
    assert c.params["a"] == 1.0
    with pytest.raises(InputError):
        unit_information_component(0.3, None, "normal", "identity")


@pytest.mark.parametrize("factor", [1e-3, 1.0, 1e3])
def test_vague_rate_component_does_not_depend_on_the_unit_of_exposure(factor: float) -> None:
    """The same rate in another unit of exposure (rate / factor) gives the same vague
    component in that unit: its shape is unchanged and its scale divides by the factor, so
    it carries the information of one expected event in any unit."""
    base = unit_information_component(0.8, None, "gamma", "rate")
    other = unit_information_component(0.8 / factor, None, "gamma", "rate")
    assert other.params["a"] == base.params["a"]
    assert other.params["scale"] == pytest.approx(base.params["scale"] / factor, rel=1e-12)
    # the normal on the log rate is the same whatever the unit
    log_base = unit_information_component(math.log(0.8), None, "normal", "log", "poisson")
    log_other = unit_information_component(math.log(0.8 / factor), None, "normal", "log", "poisson")
    assert log_other.params["scale"] == log_base.params["scale"]


def test_default_beta_vague_component_is_not_u_shaped() -> None:
    """A Beta(a, b) density is U-shaped when a < 1 and b < 1; the default has neither."""
    for mean in (0.01, 0.26, 0.5, 0.9):
        c = unit_information_component(mean, None, "beta", "probability")
        assert c.params["a"] >= 1 and c.params["b"] >= 1
        assert stats.beta(c.params["a"], c.params["b"]).cdf(0.01) == pytest.approx(0.01)


def test_vague_component_given_in_the_definition() -> None:
    informative = Prior.candidate("probability", (Component("beta", {"a": 3.0, "b": 9.0}),))
    given = vague_component(informative, "beta:0.5,0.5", likelihood="binomial")
    assert given.component.params == {"a": 0.5, "b": 0.5}
    for bad in ("beta:1", "cauchy:1,2", "beta:x,1", "beta"):
        with pytest.raises(InputError):
            vague_component(informative, bad, likelihood="binomial")


# --- posterior weights against quad -------------------------------------------------------


@pytest.mark.parametrize("y", [0.25, 1.5, -2.0])
def test_normal_robust_mixture_against_quad(y: float) -> None:
    se = 0.3
    components = with_vague_component(
        (Component("normal", {"loc": 0.2, "scale": 0.15}),),
        unit_information_component(0.2, 2.0, "normal", "identity"),
        0.2,
    )
    posterior = update(components, y, se)
    weights, mean, var = _quad_posterior(
        components, lambda t: stats.norm.logpdf(y, t, se), -15, 15, points=[0.2, y]
    )
    assert [c.weight for c in posterior] == pytest.approx(weights, rel=1e-7)
    assert _mixture_moments(posterior) == pytest.approx((mean, var), rel=1e-7)


@pytest.mark.parametrize(("events", "n"), [(3, 40), (25, 40), (0, 12), (7.5, 20.0)])
def test_beta_robust_mixture_against_quad(events: float, n: float) -> None:
    components = with_vague_component(
        (
            Component("beta", {"a": 8.0, "b": 32.0}, 0.6),
            Component("beta", {"a": 3.0, "b": 9.0}, 0.4),
        ),
        unit_information_component(0.2, None, "beta", "probability"),
        0.1,
    )

    def log_lik(t: float) -> float:
        # binomial log likelihood, written out so non-integer counts work too
        return events * math.log(t) + (n - events) * math.log1p(-t)

    posterior = update(components, events, n)
    weights, mean, var = _quad_posterior(components, log_lik, 0.0, 1.0, points=[0.05, 0.2, 0.5])
    assert [c.weight for c in posterior] == pytest.approx(weights, rel=1e-6)
    assert _mixture_moments(posterior) == pytest.approx((mean, var), rel=1e-6)
    if float(events).is_integer():  # scipy's pmf as the likelihood gives the same weights
        w_pmf, _, _ = _quad_posterior(
            components,
            lambda t: stats.binom.logpmf(int(events), int(n), t),
            0.0,
            1.0,
            points=[0.05, 0.2, 0.5],
        )
        assert w_pmf == pytest.approx(weights, rel=1e-8)


@pytest.mark.parametrize(("events", "exposure"), [(4, 10.0), (30, 12.0), (0, 3.0)])
def test_gamma_robust_mixture_against_quad(events: int, exposure: float) -> None:
    components = with_vague_component(
        (Component("gamma", {"a": 20.0, "scale": 0.025}),),
        unit_information_component(0.5, None, "gamma", "rate"),
        0.2,
    )
    posterior = update(components, events, exposure)
    weights, mean, var = _quad_posterior(
        components,
        lambda t: stats.poisson.logpmf(events, t * exposure),
        0.0,
        60.0,
        points=[0.5, events / exposure + 1e-3],
    )
    assert [c.weight for c in posterior] == pytest.approx(weights, rel=1e-6)
    assert _mixture_moments(posterior) == pytest.approx((mean, var), rel=1e-6)


def test_vague_weight_rises_under_conflict() -> None:
    """Schmidli et al. (2014): with data in conflict the robust mixture's vague weight
    rises; with data at the prior mean it falls."""
    w = 0.2
    components = with_vague_component(
        (Component("normal", {"loc": 0.0, "scale": 0.1}),),
        unit_information_component(0.0, 1.0, "normal", "identity"),
        w,
    )
    assert update(components, 0.0, 0.1)[-1].weight < w
    assert update(components, 1.0, 0.1)[-1].weight > 0.9


def test_underflowed_component_is_dropped() -> None:
    components = with_vague_component(
        (Component("normal", {"loc": 0.0, "scale": 0.01}),),
        Component("normal", {"loc": 0.0, "scale": 100.0}),
        0.1,
    )
    posterior = update(components, 500.0, 0.01)
    assert len(posterior) == 1 and posterior[0].weight == 1.0
    assert posterior[0].params["loc"] == pytest.approx(500.0, rel=1e-6)


def test_updates_check_their_input() -> None:
    normal = (Component("normal", {"loc": 0.0, "scale": 1.0}),)
    beta = (Component("beta", {"a": 1.0, "b": 1.0}),)
    gamma = (Component("gamma", {"a": 1.0, "scale": 1.0}),)
    with pytest.raises(InputError):  # no one conjugate likelihood for a mixed prior
        update(
            (
                Component("normal", {"loc": 0.0, "scale": 1.0}, 0.5),
                Component("beta", {"a": 1.0, "b": 1.0}, 0.5),
            ),
            0.0,
            1.0,
        )
    with pytest.raises(InputError):
        update(normal, 0.0, 0.0)
    with pytest.raises(InputError):
        update(beta, 5, 4)
    with pytest.raises(InputError):
        update(gamma, -1, 2.0)
    with pytest.raises(InputError):
        update((Component("normal", {"loc": 0.0, "scale": 1.0}, 0.5),), 0.0, 1.0)
    assert np.isfinite(update(gamma, 0, 2.0)[0].params["scale"])
