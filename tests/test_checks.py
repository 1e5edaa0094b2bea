"""Checks of a built prior: predictive, posterior, conflict, sensitivity, and their commands.

References: scipy.stats (betabinom, nbinom with n = a, p = b/(b+E), norm); the conjugate
closed forms Beta(a + x, b + n - x), Gamma(a + x, b + E) and the normal-normal update (common
practice); dense grids written here; seeded Monte Carlo from the prior predictive; the BCG
trials (Colditz et al. 1994, JAMA 271:698; counts in tests/test_frequentist.py).
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, stats

from registry.checks.posterior import posterior
from registry.checks.predictive import predictive, tail_probability
from registry.checks.study import Study, observed, planned
from registry.errors import InputError
from registry.values.prior import Component, Prior
from tests.test_priors import BASE, bcg  # noqa: F401  (the BCG registry fixture)

BETA_MIX = Prior.candidate(
    "probability",
    (Component("beta", {"a": 3.0, "b": 7.0}, 0.8), Component("beta", {"a": 1.0, "b": 1.0}, 0.2)),
)
GAMMA_MIX = Prior.candidate(
    "rate",
    (
        Component("gamma", {"a": 20.0, "scale": 0.05}, 0.7),
        Component("gamma", {"a": 1.0, "scale": 1.0}, 0.3),
    ),
)


def test_beta_predictive_is_the_betabinomial_mixture() -> None:
    """scipy.stats.betabinom, mixed with the prior's weights."""
    d = predictive(BETA_MIX, planned("proportion", n=40))
    k = np.arange(41)
    want = 0.8 * stats.betabinom.pmf(k, 40, 3, 7) + 0.2 * stats.betabinom.pmf(k, 40, 1, 1)
    np.testing.assert_allclose(d.pmf, want, rtol=1e-12, atol=1e-15)
    mean = 0.8 * stats.betabinom.mean(40, 3, 7) + 0.2 * stats.betabinom.mean(40, 1, 1)
    assert d.mean == pytest.approx(mean, rel=1e-12)


def test_gamma_predictive_is_the_negative_binomial_mixture() -> None:
    """scipy.stats.nbinom with n = a and p = rate / (rate + E) (its standard parameterisation)."""
    e = 30.0
    d = predictive(GAMMA_MIX, planned("rate", exposure=e))
    want = 0.7 * stats.nbinom.pmf(d.k, 20, 20 / (20 + e)) + 0.3 * stats.nbinom.pmf(
        d.k, 1, 1 / (1 + e)
    )
    np.testing.assert_allclose(d.pmf, want, rtol=1e-12, atol=1e-15)
    assert d.quantile(0.5) == pytest.approx(np.searchsorted(np.cumsum(want), 0.5))


def test_normal_predictive_is_the_closed_form_and_lognormal_agrees_numerically() -> None:
    """y ~ N(m, s² + S²) (common practice); a log-normal prior's log is N(log scale, s²)."""
    prior = Prior.candidate("log", (Component("normal", {"loc": -0.3, "scale": 0.2}),))
    d = predictive(prior, planned("rate_ratio", se=0.15))
    ref = stats.norm(-0.3, math.hypot(0.2, 0.15))
    assert d.mean == pytest.approx(-0.3) and d.sd == pytest.approx(ref.std())
    assert d.quantile(0.975) == pytest.approx(ref.ppf(0.975), abs=1e-8)
    lognormal = Prior.candidate(
        "ratio", (Component("lognormal", {"s": 0.2, "scale": math.exp(-0.3)}),)
    )
    g = predictive(lognormal, planned("rate_ratio", se=0.15))
    assert g.quantile(0.975) == pytest.approx(ref.ppf(0.975), abs=1e-4)
    assert g.sd == pytest.approx(ref.std(), rel=1e-4)


def test_beta_and_gamma_posteriors_are_the_conjugate_closed_forms() -> None:
    """Beta(a + x, b + n - x) and Gamma(a + x, rate b + E); weights w_j m_j by hand."""
    post = posterior(BETA_MIX, observed("proportion", events=12, n=20))
    assert post.components[0] == {"weight": post.weights[0], "family": "beta", "a": 15.0, "b": 15.0}
    m = [stats.betabinom.pmf(12, 20, 3, 7), stats.betabinom.pmf(12, 20, 1, 1)]
    w = np.array([0.8 * m[0], 0.2 * m[1]])
    np.testing.assert_allclose(post.weights, w / w.sum(), rtol=1e-10)
    post = posterior(GAMMA_MIX, observed("rate", events=15, exposure=30))
    assert post.components[0]["a"] == 35.0
    assert post.components[0]["scale"] == pytest.approx(1 / (20 + 30))


def _grid_posterior(logprior, loglik, lo: float, hi: float) -> tuple[float, float]:
    """Mean and sd on a dense uniform grid (200,001 points, Simpson's rule)."""
    x = np.linspace(lo, hi, 200_001)
    lp = logprior(x) + loglik(x)
    f = np.exp(lp - lp.max())
    z = integrate.simpson(f, x=x)
    mean = integrate.simpson(x * f, x=x) / z
    return mean, math.sqrt(integrate.simpson((x - mean) ** 2 * f, x=x) / z)


@pytest.mark.parametrize(
    ("prior", "study", "logprior", "loglik", "bounds"),
    [
        (
            Prior.candidate(
                "identity", (Component("student_t", {"df": 4, "loc": 0.1, "scale": 0.3}),)
            ),
            Study("normal", 0.2, 0.5),
            stats.t(4, 0.1, 0.3).logpdf,
            lambda x: stats.norm.logpdf(0.5, x, 0.2),
            (-8, 8),
        ),
        (
            Prior.candidate(
                "logit",
                (
                    Component("normal", {"loc": -0.8, "scale": 0.5}, 0.6),
                    Component("student_t", {"df": 3, "loc": 0.0, "scale": 1.0}, 0.4),
                ),
            ),
            Study("binomial", 50, 21),
            lambda x: np.logaddexp(
                math.log(0.6) + stats.norm(-0.8, 0.5).logpdf(x),
                math.log(0.4) + stats.t(3).logpdf(x),
            ),
            lambda x: stats.binom.logpmf(21, 50, 1 / (1 + np.exp(-x))),
            (-15, 15),
        ),
    ],
)
def test_numerical_posteriors_match_a_dense_grid(prior, study, logprior, loglik, bounds) -> None:
    post = posterior(prior, study)
    mean, sd = _grid_posterior(logprior, loglik, *bounds)
    assert post.summary.mean == pytest.approx(mean, abs=1e-3 * sd)
    assert post.summary.sd == pytest.approx(sd, rel=2e-3)
    assert post.accuracy < 1e-2


def test_lognormal_rate_with_poisson_data_matches_a_dense_grid() -> None:
    prior = Prior.candidate("rate", (Component("lognormal", {"s": 0.4, "scale": 0.8}),))
    post = posterior(prior, observed("rate", events=40, exposure=30))
    x = np.linspace(1e-4, 6, 400_001)
    lp = stats.lognorm(0.4, scale=0.8).logpdf(x) + stats.poisson.logpmf(40, 30 * x)
    f = np.exp(lp - lp.max())
    mean = integrate.simpson(x * f, x=x) / integrate.simpson(f, x=x)
    assert post.summary.mean == pytest.approx(mean, rel=1e-4)


def test_box_tail_probability_matches_monte_carlo() -> None:
    """Seeded draws from the prior predictive: theta from the prior, then the count."""
    rng = np.random.default_rng(20260101)
    draws = BETA_MIX.rvs(400_000, seed=7)
    y = rng.binomial(40, draws)
    for observed_y in (3, 12, 30):
        lower, upper = np.mean(y <= observed_y), np.mean(y >= observed_y)
        mc = min(1.0, 2 * min(lower, upper))
        error = 2 * math.sqrt(mc * (1 - mc) / len(y)) + 1e-6
        got = tail_probability(predictive(BETA_MIX, planned("proportion", n=40)), observed_y)
        assert abs(got - mc) < 4 * error


@pytest.mark.parametrize(
    ("measure", "options", "field"),
    [
        ("proportion", {"events": 5, "n": 4}, "--events"),
        ("rate", {"events": 5, "exposure": -1}, "--exposure"),
        ("rate", {"events": 5, "n": 10}, "--n"),
        ("rate_ratio", {"events": 5, "n": 10}, "--events"),
        ("proportion", {"events": 2.5, "n": 10}, "--events"),
    ],
)
def test_bad_data_names_the_option(measure: str, options: dict, field: str) -> None:
    with pytest.raises(InputError) as caught:
        observed(measure, **options)
    assert caught.value.field == field


DEFINITION = BASE.replace('target = "mean"', 'target = "mean"').replace(
    '[discount]\nmechanism = "none"', '[discount]\nmechanism = "none"\nrobust_weight = 0.2'
)


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_commands_on_the_bcg_prior_write_nothing(cli, bcg, tmp_path: Path) -> None:  # noqa: F811
    definition = tmp_path / "bcg.toml"
    definition.write_text(DEFINITION)
    assert cli("build", definition, "--db", bcg).code == 0
    before = _digest(bcg)
    r = cli("predict", "bcg", "--se", "0.2", "--json", "--db", bcg)
    assert r.code == 0 and _digest(bcg) == before
    doc = json.loads(r.stdout)
    assert {"prior", "design", "outcome", "mean", "sd", "quantiles", "plausible"} <= set(doc)
    r = cli("update", "bcg", "--estimate", "-0.5", "--se", "0.2", "--json", "--db", bcg)
    assert r.code == 0 and _digest(bcg) == before
    doc = json.loads(r.stdout)
    assert {"prior", "data", "posterior", "weights", "conflict"} <= set(doc)
    assert {"p_value", "method", "level", "conflict"} <= set(doc["conflict"])
    assert {"components", "mean", "sd", "quantiles"} <= set(doc["posterior"])
    update = doc
    sweep = ("sensitivity", "bcg", "--estimate", "-0.5", "--se", "0.2", "--over")
    sweep += ("robust_weight", "--probability-below", "-0.4", "--json", "--db", bcg)
    r = cli(*sweep, "--values", "0,0.2,0.5,1", "--decide", "0.5")
    assert r.code == 0 and _digest(bcg) == before
    doc = json.loads(r.stdout)
    assert {"prior", "over", "rows", "tipping_point"} <= set(doc)
    # at the stored weight the sweep is the update of the stored prior
    row = next(x for x in doc["rows"] if x["value"] == 0.2)
    assert row["posterior"]["mean"] == pytest.approx(update["posterior"]["mean"], rel=1e-9)
    # at weight 1 it is the update of the vague component alone (normal-normal closed form)
    vague = json.loads(cli("prior", "bcg", "--json", "--db", bcg).stdout)["robust"]["component"]
    m, s = vague["loc"], vague["scale"]
    precision = 1 / s**2 + 1 / 0.2**2
    last = doc["rows"][-1]
    assert last["posterior"]["mean"] == pytest.approx((m / s**2 - 0.5 / 0.2**2) / precision)
    # the tipping point lies between the rows whose probability crosses 0.5 (bisection check)
    tp = doc["tipping_point"]
    probs = [(x["value"], x["probability"]) for x in doc["rows"]]
    crossing = [
        (a, b) for (a, pa), (b, pb) in itertools.pairwise(probs) if (pa - 0.5) * (pb - 0.5) < 0
    ]
    if crossing:
        lo, hi = crossing[0]
        assert lo <= tp <= hi
        near = [
            json.loads(cli(*sweep, "--values", f"{v}").stdout)["rows"][0]["probability"]
            for v in (max(tp - 2e-3, 0), min(tp + 2e-3, 1))
        ]
        assert (near[0] - 0.5) * (near[1] - 0.5) <= 0
    else:
        assert tp is None
    bad = cli("update", "bcg", "--events", "3", "--n", "10", "--db", bcg)
    assert bad.code == 2 and len(bad.stderr.strip().splitlines()) == 1
    assert _digest(bcg) == before
