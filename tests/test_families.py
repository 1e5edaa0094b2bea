"""Every family through the same round trips, against scipy.stats and dense grids.

References: scipy.stats (densities, quantiles, moments, beta-binomial and negative binomial
distributions); integrals by scipy.integrate.quad of prior x likelihood, written here;
derivatives by central differences. The conjugate updates are the textbook forms (Beta(a + x,
b + n - x), Gamma(a + x, rate + E), normal precision weighting: common practice).
"""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from scipy import integrate, special, stats

from registry.errors import InputError
from registry.values.families import FAMILIES, Beta, Gamma, Normal, make, to_canonical
from registry.values.prior import Component, Prior

CASES = {
    "normal": [{"loc": -0.4, "scale": 0.3}, {"loc": 12.0, "scale": 5.0}],
    "student_t": [{"df": 3.0, "loc": 0.2, "scale": 0.5}, {"df": 30.0, "loc": -1.0, "scale": 2.0}],
    "lognormal": [{"s": 0.4, "scale": 0.8}, {"s": 1.2, "scale": 3.0}],
    "beta": [{"a": 3.0, "b": 9.0}, {"a": 0.7, "b": 1.6}],
    "gamma": [{"a": 4.0, "scale": 0.25}, {"a": 0.8, "scale": 3.0}],
}
PARAMS = [(name, p) for name, ps in CASES.items() for p in ps]
IDS = [f"{name}-{i}" for name, ps in CASES.items() for i in range(len(ps))]


def reference(name: str, params: dict[str, float]):
    return getattr(stats, FAMILIES[name].scipy_name)(**params)


def test_every_family_has_cases() -> None:
    assert set(CASES) == set(FAMILIES)


@pytest.mark.parametrize(("name", "params"), PARAMS, ids=IDS)
def test_quantile_round_trip_and_scipy_agreement(name: str, params: dict[str, float]) -> None:
    dist, ref = make(name, params), reference(name, params)
    q = np.array([1e-6, 0.01, 0.3, 0.5, 0.9, 0.999])
    x = dist.ppf(q)
    assert dist.cdf(x) == pytest.approx(q, rel=1e-9, abs=1e-12)
    assert dist.logpdf(x) == pytest.approx(ref.logpdf(x), rel=1e-12)
    assert dist.mean() == pytest.approx(ref.mean(), rel=1e-12)
    assert dist.var() == pytest.approx(ref.var(), rel=1e-12)
    draws = dist.rvs(20000, np.random.default_rng(7))
    assert stats.kstest(draws, ref.cdf).pvalue > 1e-3


@pytest.mark.parametrize(("name", "params"), PARAMS, ids=IDS)
def test_canonical_terms(name: str, params: dict[str, float]) -> None:
    """log p(phi) = log p(x) + log |dx/dphi|; derivatives by central differences."""
    dist, ref = make(name, params), reference(name, params)
    x = ref.ppf(np.array([0.02, 0.3, 0.7, 0.98]))
    phi = np.asarray(to_canonical(dist.support, x))
    log_jac = {
        "real": lambda: 0.0 * x,
        "positive": lambda: np.log(x),
        "unit": lambda: np.log(x) + np.log1p(-x),
    }[dist.support]()
    value, d1, d2 = dist.canonical_terms(phi)
    assert value == pytest.approx(ref.logpdf(x) + log_jac, rel=1e-10)
    h = 1e-4

    def f(p):
        return dist.canonical_terms(p)[0]

    assert d1 == pytest.approx((f(phi + h) - f(phi - h)) / (2 * h), rel=1e-6, abs=1e-8)
    assert d2 == pytest.approx((f(phi + h) - 2 * f(phi) + f(phi - h)) / h**2, rel=1e-4, abs=1e-6)
    for u in (0.01, 0.5, 0.99):
        assert dist.canonical_ppf(u) == pytest.approx(
            float(to_canonical(dist.support, ref.ppf(u))), rel=1e-9
        )


@pytest.mark.parametrize(("name", "params"), PARAMS, ids=IDS)
def test_tail_rates_are_the_slopes_far_out(name: str, params: dict[str, float]) -> None:
    """d/dphi log p(phi) tends to the stated rate at -inf and to minus it at +inf (an
    infinite rate: the slope grows without bound; 0: it vanishes)."""
    dist = make(name, params)
    left, right = dist.tail_rates()
    far = 40.0 if dist.support != "real" else 1e6 * params.get("scale", 1.0)
    centre = dist.canonical_ppf(0.5)

    def slopes(d: float) -> tuple[float, float]:
        grad = dist.canonical_terms(np.array([centre - d, centre + d]))[1]
        return float(grad[0]), -float(grad[1])

    near, further = slopes(far), slopes(2 * far)
    for rate, slope, slope_further in zip((left, right), near, further, strict=True):
        if math.isinf(rate):  # at least linear growth
            assert slope > 0 and slope_further > 1.5 * slope
        else:
            assert slope_further == pytest.approx(rate, abs=1e-4)


@pytest.mark.parametrize("name", list(CASES))
def test_log_densities_and_cdfs_of_many_members_match_scipy(name: str) -> None:
    """The vectorised log densities and distribution functions (closed forms for the
    families EM fits) against scipy's logpdf and cdf of each member alone, from far in the
    tails to the ends of the support."""
    cls = FAMILIES[name]
    members = CASES[name]
    params = np.array([[p[k] for k in cls.parameter_names()] for p in members])
    refs = [reference(name, p) for p in members]
    x = np.unique(np.concatenate([r.ppf(np.geomspace(1e-12, 1 - 1e-12, 200)) for r in refs]))
    ends = {"real": [], "positive": [0.0], "unit": [0.0, 1.0]}[cls.support]
    x = np.concatenate([ends, x])
    for got, want_of in ((cls.log_densities(params, x), "logpdf"), (cls.cdfs(params, x), "cdf")):
        assert got.shape == (len(members), x.size)
        for row, ref in zip(got, refs, strict=True):
            want = getattr(ref, want_of)(x)
            finite = np.isfinite(want)
            np.testing.assert_array_equal(row[~finite], want[~finite])
            np.testing.assert_allclose(row[finite], want[finite], rtol=1e-13, atol=1e-300)


UPDATES = [
    (Normal(0.3, 0.5), (1.1, 0.4), lambda t, y, se: stats.norm.pdf(y, t, se), 0.0),
    (Beta(3.0, 9.0), (7.0, 20.0), lambda t, x, n: stats.binom.pmf(x, n, t), None),
    (Gamma(4.0, 0.25), (9.0, 6.0), lambda t, x, e: stats.poisson.pmf(x, t * e), None),
]


@pytest.mark.parametrize(("prior", "data", "likelihood", "_"), UPDATES)
def test_conjugate_update_against_quadrature(prior, data, likelihood, _) -> None:
    lo, hi = prior.ppf(1e-12), prior.ppf(1 - 1e-12)

    def moment(k: int) -> float:
        return integrate.quad(
            lambda t: t**k * prior.pdf(t) * likelihood(t, *data), lo, hi, limit=400,
            epsabs=0, epsrel=1e-12,
        )[0]  # fmt: skip

    posterior, log_marginal = prior.update(*data)
    evidence = moment(0)
    assert posterior.mean() == pytest.approx(moment(1) / evidence, rel=1e-8)
    assert posterior.var() == pytest.approx(
        moment(2) / evidence - (moment(1) / evidence) ** 2, rel=1e-6
    )
    # the marginal leaves out the terms every component shares: C(n, x), E^x / x!
    common = {
        "normal": lambda: 0.0,
        "beta": lambda: math.log(special.comb(data[1], data[0])),
        "gamma": lambda: data[0] * math.log(data[1]) - special.gammaln(data[0] + 1),
    }[prior.name]()
    assert log_marginal + common == pytest.approx(math.log(evidence), rel=1e-8)


def test_closed_form_predictives() -> None:
    """Beta-binomial, negative binomial and normal predictives against quadrature."""
    beta, gamma, normal = Beta(3.0, 9.0), Gamma(4.0, 0.25), Normal(0.3, 0.5)
    for x in (0, 3, 11):
        want = integrate.quad(lambda t, x=x: stats.binom.pmf(x, 20, t) * beta.pdf(t), 0, 1)[0]
        assert beta.predictive(20).pmf(x) == pytest.approx(want, rel=1e-8)
        want = integrate.quad(
            lambda t, x=x: stats.poisson.pmf(x, 6 * t) * gamma.pdf(t), 0, 60, limit=200
        )[0]
        assert gamma.predictive(6.0).pmf(x) == pytest.approx(want, rel=1e-8)
    assert normal.predictive(0.4).std() == pytest.approx(math.hypot(0.5, 0.4))


def test_values_are_immutable_hashable_and_equal_by_value() -> None:
    a = Component("normal", {"scale": 0.3, "loc": -0.4}, 0.5)
    b = Component("normal", {"loc": -0.4, "scale": 0.3}, 0.5)
    assert a == b and hash(a) == hash(b) and list(a.params) == ["loc", "scale"]
    with pytest.raises(dataclasses.FrozenInstanceError):
        a.weight = 0.2  # type: ignore[misc]
    with pytest.raises(TypeError):
        a.params["loc"] = 1.0  # type: ignore[index]
    p = Prior("x", 1, "d", "log", (a, b), ess={"notes": {"m": "why"}})
    q = Prior("x", 1, "d", "log", (b, a), ess={"notes": {"m": "why"}})
    assert p == q and hash(p) == hash(q) and len({p, q}) == 1
    with pytest.raises(TypeError):
        p.ess["notes"]["m"] = "changed"  # type: ignore[index]
    with pytest.raises(dataclasses.FrozenInstanceError):
        Normal(0.0, 1.0).loc = 2.0  # type: ignore[misc]


@pytest.mark.parametrize(
    ("name", "params"),
    [
        ("normal", {"loc": 0.0, "scale": 0.0}),
        ("beta", {"a": -1.0, "b": 1.0}),
        ("gamma", {"a": 1.0}),
        ("cauchy", {"loc": 0.0, "scale": 1.0}),
        ("normal", {"loc": math.nan, "scale": 1.0}),
    ],
)
def test_bad_parameters_are_refused(name: str, params: dict[str, float]) -> None:
    with pytest.raises(InputError):
        make(name, params)
