"""Effective sample size.

References (values recalled from memory where marked): Morita, Thall & Mueller (2008,
Biometrics 64:595): ESS of Beta(a, b) is a + b, of Gamma(shape a, rate b) for Poisson data
is b, of N(m, s^2) for normal data with sd s_u is s_u^2/s^2 (recalled). Neuenschwander,
Weber, Schmidli & O'Hagan (2020, Biometrics 76:578): the expected local information ratio
gives the same values in these cases and is predictively consistent: the expected ESS of
the posterior after n units equals the prior's ESS plus n (recalled). Moments of the
Student-t and lognormal are handbook formulas (Johnson, Kotz & Balakrishnan, Continuous
Univariate Distributions); scipy is the numerical reference.
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, special, stats

from registry.errors import InputError, NumericalError
from registry.priors.ess import (
    CanonicalDensity,
    data_model,
    ess,
    ess_all,
    ess_of_density,
    information_shares,
    power_for_ess_cap,
    solve_power_for_cap,
)
from registry.priors.update import update, with_vague_component
from registry.values.families import to_canonical
from registry.values.prior import Component, Prior

METHODS = ("variance_match", "curvature_at_mean", "expected_information")


def prior(scale: str, *components: Component) -> Prior:
    return Prior("test", 1, "digest", scale, components)


# --- conjugate families: every method gives the standard ESS ------------------------------------


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize(("a", "b"), [(3.0, 7.0), (12.5, 40.0), (0.5, 0.5), (1.0, 1.0)])
def test_beta_ess_is_a_plus_b(method: str, a: float, b: float) -> None:
    """Morita et al. (2008); Neuenschwander et al. (2020): Beta(a, b) has ESS a + b."""
    result = ess(prior("probability", Component("beta", {"a": a, "b": b})), method=method)
    assert result.value == pytest.approx(a + b, rel=1e-6)
    assert result.unit == "participants"


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize(("s", "s_u"), [(0.5, 2.0), (0.1, 1.0), (3.0, 1.5)])
def test_normal_ess_is_unit_variance_over_variance(method: str, s: float, s_u: float) -> None:
    """Morita et al. (2008); Neuenschwander et al. (2020): N(m, s^2) with unit sd s_u has
    ESS s_u^2 / s^2."""
    p = prior("identity", Component("normal", {"loc": 0.7, "scale": s}))
    assert ess(p, method=method, unit_sd=s_u).value == pytest.approx(s_u**2 / s**2, rel=1e-6)


@pytest.mark.parametrize("method", METHODS)
@pytest.mark.parametrize(("shape", "rate"), [(4.0, 20.0), (0.8, 2.5), (30.0, 100.0)])
def test_gamma_ess_is_its_rate(method: str, shape: float, rate: float) -> None:
    """Gamma(shape, rate) for a Poisson rate per unit exposure has ESS = rate, in units of
    exposure (Morita et al. 2008; Neuenschwander et al. 2020, recalled)."""
    p = prior("rate", Component("gamma", {"a": shape, "scale": 1.0 / rate}))
    result = ess(p, method=method)
    assert result.value == pytest.approx(rate, rel=1e-6)
    assert result.unit == "units of exposure"


# --- non-conjugate priors against closed forms from handbook moments -------------------------


def test_student_t_prior() -> None:
    """t(nu, m, s) with normal data of sd s_u.
    moment: var = s^2 nu/(nu-2) (handbook), so ESS = s_u^2 (nu-2)/(nu s^2);
    morita: curvature at the centre (nu+1)/(nu s^2);
    elir: E_prior[-d2 log p] is the Fisher information of the t location family,
    (nu+1)/((nu+3) s^2) (Lange, Little & Taylor 1989, JASA 84:881, recalled); so
    ESS = s_u^2 (nu+1)/((nu+3) s^2). Neuenschwander et al. (2020) use this case to show
    that the curvature at the centre overstates the ESS."""
    nu, s, s_u = 5.0, 0.5, 2.0
    p = prior("identity", Component("student_t", {"df": nu, "loc": 1.0, "scale": s}))
    values = ess_all(p, unit_sd=s_u)
    assert values["variance_match"] == pytest.approx(s_u**2 * (nu - 2) / (nu * s**2), rel=1e-9)
    assert values["curvature_at_mean"] == pytest.approx(s_u**2 * (nu + 1) / (nu * s**2), rel=1e-9)
    assert values["expected_information"] == pytest.approx(
        s_u**2 * (nu + 1) / ((nu + 3) * s**2), rel=1e-6
    )
    assert values["expected_information"] < values["curvature_at_mean"]


def test_normal_prior_on_logit_scale() -> None:
    """N(mu, s^2) on logit p, binomial data. i_F = p(1-p), so the ELIR is
    E[1/(p(1-p))]/s^2 = (2 + E e^phi + E e^-phi)/s^2, with E e^{+-phi} = e^{+-mu + s^2/2}
    (lognormal mean, handbook). Moment matching uses s_u^2 = 1/(p(1-p)) at the prior mean."""
    mu, s = -1.0, 0.4
    p = prior("logit", Component("normal", {"loc": mu, "scale": s}))
    values = ess_all(p)
    expected = (2 + math.exp(mu + s * s / 2) + math.exp(-mu + s * s / 2)) / s**2
    assert values["expected_information"] == pytest.approx(expected, rel=1e-6)
    pm = special.expit(mu)
    assert values["variance_match"] == pytest.approx(1 / (pm * (1 - pm) * s * s), rel=1e-9)


def test_lognormal_prior_on_a_rate() -> None:
    """lognormal(mu, s) on a Poisson rate. ELIR on log lambda: E[e^-phi]/s^2 with
    E e^-phi = e^{-mu + s^2/2}; moment matching to a gamma: m/v with the lognormal moments
    m = e^{mu + s^2/2}, v = (e^{s^2} - 1) e^{2 mu + s^2} (handbook)."""
    mu, s = math.log(2.0), 0.3
    p = prior("rate", Component("lognormal", {"s": s, "scale": math.exp(mu)}))
    values = ess_all(p)
    assert values["expected_information"] == pytest.approx(
        math.exp(-mu + s * s / 2) / s**2, rel=1e-6
    )
    m, v = math.exp(mu + s * s / 2), (math.exp(s * s) - 1) * math.exp(2 * mu + s * s)
    assert values["variance_match"] == pytest.approx(m / v, rel=1e-9)


# --- mixtures -----------------------------------------------------------------------------


def _curvature_fd(logpdf, x: float, h: float) -> float:
    """-d2/dx2 log p by a central difference of a scipy log density."""
    return -(logpdf(x + h) - 2 * logpdf(x) + logpdf(x - h)) / h**2


@pytest.mark.parametrize(
    "components",
    [
        (
            Component("normal", {"loc": 0.0, "scale": 0.3}, 0.6),
            Component("normal", {"loc": 0.8, "scale": 1.0}, 0.4),
        ),
        (
            Component("student_t", {"df": 3.0, "loc": -0.2, "scale": 0.25}, 0.7),
            Component("normal", {"loc": 0.5, "scale": 1.5}, 0.3),
        ),
    ],
)
def test_elir_of_mixture_against_direct_quadrature(components: tuple) -> None:
    """ELIR = E_p[i_p / i_F] (Neuenschwander et al. 2020), computed here independently
    with scipy's log densities, finite differences and quad over theta."""
    s_u = 2.0
    dists = [(math.log(c.weight), c.dist.frozen()) for c in components]

    def logpdf(x: float) -> float:
        return float(special.logsumexp([lw + d.logpdf(x) for lw, d in dists]))

    def integrand(x: float) -> float:
        return math.exp(logpdf(x)) * _curvature_fd(logpdf, x, 1e-4) * s_u**2

    reference = integrate.quad(integrand, -40, 40, points=[-0.2, 0.0, 0.5, 0.8], limit=400)[0]
    p = prior("identity", *components)
    assert ess(p, method="expected_information", unit_sd=s_u).value == pytest.approx(
        reference, rel=1e-5
    )


@pytest.mark.parametrize(
    ("scale", "components"),
    [
        (
            "probability",
            (
                Component("beta", {"a": 20.0, "b": 60.0}, 0.7),
                Component("beta", {"a": 0.25, "b": 0.75}, 0.3),
            ),
        ),
        (
            "rate",
            (
                Component("gamma", {"a": 40.0, "scale": 0.01}, 0.5),
                Component("lognormal", {"s": 0.3, "scale": 0.45}, 0.5),
            ),
        ),
    ],
)
def test_morita_curvature_on_the_prior_scale(scale: str, components: tuple) -> None:
    """Morita et al. (2008): ESS = (D_p - D_0)/i_F at the prior mean. D_p is recomputed
    here by finite differences of scipy's log densities on the prior's own scale; D_0, the
    epsilon-information limit, is -1/x^2 - 1/(1-x)^2 on (0, 1) and -1/x^2 on (0, inf)
    (derived from the beta and gamma log densities)."""
    p = prior(scale, *components)
    x = p.mean()

    def logpdf(t: float) -> float:
        return float(p.logpdf(np.array([t]))[0])

    d_p = _curvature_fd(logpdf, x, 1e-4 * x)
    if scale == "probability":
        d_0, i_f = -1 / x**2 - 1 / (1 - x) ** 2, 1 / (x * (1 - x))
    else:
        d_0, i_f = -1 / x**2, 1 / x
    assert ess(p, method="curvature_at_mean").value == pytest.approx((d_p - d_0) / i_f, rel=1e-5)


def test_morita_is_zero_where_the_mean_sits_in_a_trough() -> None:
    """Two separated normals: the log density is convex at the mean (checked with scipy), so
    the ESS of Morita et al. (2008), minimised over m >= 0, is 0; we say so."""
    p = prior(
        "identity",
        Component("normal", {"loc": -3.0, "scale": 0.5}, 0.5),
        Component("normal", {"loc": 3.0, "scale": 0.5}, 0.5),
    )
    assert _curvature_fd(lambda t: float(p.logpdf(np.array([t]))[0]), 0.0, 1e-4) < 0
    values = ess_all(p, unit_sd=1.0)
    assert values["curvature_at_mean"] == 0.0
    assert "m = 0" in values["notes"]["curvature_at_mean"]
    assert values["expected_information"] > 0


@pytest.mark.parametrize(
    ("scale", "informative", "vague"),
    [
        (
            "probability",
            Component("beta", {"a": 30.0, "b": 70.0}),
            Component("beta", {"a": 1.0, "b": 1.0}),  # the default vague component,
        ),
        (
            "identity",
            Component("normal", {"loc": 0.0, "scale": 0.2}),
            Component("normal", {"loc": 0.0, "scale": 2.0}),  # one observation of sd 2,
        ),
        (
            "rate",
            Component("gamma", {"a": 50.0, "scale": 0.01}),
            Component("gamma", {"a": 1.0, "scale": 0.5}),  # one expected event,
        ),
    ],
)
def test_elir_of_robust_mixture_falls_as_vague_weight_rises(
    scale: str, informative: Component, vague: Component
) -> None:
    """Neuenschwander et al. (2020) discuss robust mixtures (Schmidli et al. 2014): more vague
    weight, less information. The ELIR must fall strictly along a grid of weights, from the
    informative component's ESS towards the vague component's own."""
    unit_sd = 2.0 if scale == "identity" else None
    full = ess(prior(scale, informative), method="expected_information", unit_sd=unit_sd).value
    values = [
        ess(
            prior(scale, *with_vague_component((informative,), vague, w)),
            method="expected_information",
            unit_sd=unit_sd,
        ).value
        for w in (0.01, 0.1, 0.2, 0.4, 0.6, 0.8, 0.95, 0.999)
    ]
    assert all(later < earlier for earlier, later in itertools.pairwise(values))
    assert values[0] < full
    alone = ess(prior(scale, vague), method="expected_information", unit_sd=unit_sd).value
    assert values[-1] == pytest.approx(alone, rel=0.05)


def test_elir_is_predictively_consistent_for_a_beta_mixture() -> None:
    """Neuenschwander et al. (2020), recalled: E over the prior predictive of the posterior's
    ELIR after n participants equals the prior's ELIR + n. The predictive probabilities are
    scipy's beta-binomial pmf; the exact sum over x = 0..n."""
    components = (
        Component("beta", {"a": 6.0, "b": 14.0}, 0.8),
        Component("beta", {"a": 0.3, "b": 0.7}, 0.2),
    )
    n = 15
    x = np.arange(n + 1)
    pmf = sum(
        c.weight * stats.betabinom.pmf(x, n, c.params["a"], c.params["b"]) for c in components
    )
    expected_posterior = sum(
        float(pmf[k])
        * ess(prior("probability", *update(components, k, n)), method="expected_information").value
        for k in range(n + 1)
    )
    prior_elir = ess(prior("probability", *components), method="expected_information").value
    assert expected_posterior == pytest.approx(prior_elir + n, rel=1e-5)


def test_methods_that_cannot_apply_say_why() -> None:
    p = prior("logit", Component("student_t", {"df": 4.0, "loc": 0.0, "scale": 1.0}))
    with pytest.raises(NumericalError, match="variance_match"):
        ess(p, method="expected_information")
    values = ess_all(p)
    assert (
        values["expected_information"] is None
        and "diverges" in values["notes"]["expected_information"]
    )
    assert values["variance_match"] > 0
    heavy = prior("identity", Component("student_t", {"df": 2.0, "loc": 0.0, "scale": 1.0}))
    assert ess_all(heavy, unit_sd=1.0)["variance_match"] is None


def test_data_model_needs_to_be_said_where_the_scale_is_ambiguous() -> None:
    p = prior("log", Component("normal", {"loc": 0.0, "scale": 0.3}))
    with pytest.raises(InputError) as info:
        ess(p, method="variance_match")
    assert info.value.field == "unit_sd"
    assert ess(p, method="variance_match", likelihood="poisson").unit == "units of exposure"
    with pytest.raises(InputError):
        data_model("probability", unit_sd=1.0)
    with pytest.raises(InputError):
        data_model("rate", likelihood="binomial")
    assert data_model("fisher_z").unit_sd == 1.0
    beta_on_logit = prior("logit", Component("normal", {"loc": 0.0, "scale": 1.0}))
    assert ess(beta_on_logit, method="variance_match", unit="patients").unit == "patients"


# --- the cap and the shares --------------------------------------------------------------


@settings(max_examples=80, deadline=None, derandomize=True)
@given(
    ses=st.lists(st.floats(0.02, 2.0), min_size=1, max_size=8),
    tau2=st.floats(0.0, 0.5),
    s_u=st.floats(0.5, 4.0),
    fraction=st.floats(0.01, 0.99),
)
def test_cap_is_met_within_one_percent(
    ses: list[float], tau2: float, s_u: float, fraction: float
) -> None:
    """A common global power weight a on every entry of a normal random-effects pool: the
    prior variance is 1 / sum_i 1/(se_i^2/a + tau^2) (inverse-variance pooling, common
    practice), its ESS s_u^2 / variance. Solve for the cap; check the cap within 1%."""

    def ess_of_power(a: float) -> float:
        return s_u**2 * sum(1.0 / (se**2 / a + tau2) for se in ses)

    cap = fraction * ess_of_power(1.0)
    a = solve_power_for_cap(ess_of_power, cap)
    assert 0 < a < 1
    assert ess_of_power(a) == pytest.approx(cap, rel=0.01)


@pytest.mark.parametrize("known", [(0.2, 0.3, 0.6, 0.9), (0.45, 0.5), (0.01,)])
def test_cap_bracketed_by_known_weights(known: tuple[float, ...]) -> None:
    """The normal random-effects pool of the test above, ESS = s_u^2 sum_i 1/(se_i^2/a +
    tau^2), against its exact root (a quadratic for two entries, solved here); weights whose
    ESS is known bracket the root, and no weight outside that bracket is tried."""
    ses, tau2, cap = (0.2, 0.5), 0.04, 8.0
    asked: list[float] = []

    def ess_of_power(a: float) -> float:
        asked.append(a)
        return sum(1.0 / (se**2 / a + tau2) for se in ses)

    # cap = sum 1/(s_i/a + t) with s_i = se_i^2: c(s1 + t a)(s2 + t a) = a(s1 + s2 + 2 t a)
    s1, s2 = (se**2 for se in ses)
    quadratic = (cap * tau2**2 - 2 * tau2, cap * tau2 * (s1 + s2) - (s1 + s2), cap * s1 * s2)
    exact = [r.real for r in np.roots(quadratic) if abs(r.imag) < 1e-12 and 0 < r.real < 1]
    a = solve_power_for_cap(ess_of_power, cap, known=known)
    assert a == pytest.approx(exact[0], rel=1e-9)
    below = [w for w in known if w < a]
    lowest = max(below) if below else 0.0
    assert all(w in (*known, 1.0) or lowest <= w <= 1.0 for w in asked)
    if below:
        above = min(w for w in (*known, 1.0) if w > a)
        assert all(w in (*known, 1.0) or lowest <= w <= above for w in asked)


def test_cap_on_a_robust_mixture_by_elir() -> None:
    """The cap met through the ESS of the finished prior: a power weight a on a normal
    summary N(m, se^2) gives N(m, se^2/a), then robustified with 20% vague weight."""
    vague = Component("normal", {"loc": 0.0, "scale": 2.0})  # one observation of sd 2

    def ess_of_power(a: float) -> float:
        informative = Component("normal", {"loc": 0.0, "scale": 0.1 / math.sqrt(a)})
        return ess(
            prior("identity", *with_vague_component((informative,), vague, 0.2)),
            method="expected_information",
            unit_sd=2.0,
        ).value

    a = solve_power_for_cap(ess_of_power, 50.0)
    assert ess_of_power(a) == pytest.approx(50.0, rel=0.01)
    assert solve_power_for_cap(ess_of_power, 1e6) == 1.0


def test_cap_that_cannot_be_met_is_an_error() -> None:
    with pytest.raises(NumericalError, match="cap"):
        solve_power_for_cap(lambda a: 100.0, 50.0)  # no weight lowers this ESS
    with pytest.raises(NumericalError, match="smoothly"):
        solve_power_for_cap(lambda a: 100.0 if a > 0.5 else 10.0, 50.0)  # a jump over the cap
    with pytest.raises(InputError):
        solve_power_for_cap(lambda a: a, 0.0)


@settings(max_examples=80, deadline=None, derandomize=True)
@given(st.lists(st.floats(0.0, 1e6), min_size=1, max_size=30).filter(lambda v: sum(v) > 0))
def test_shares_sum_to_one(values: list[float]) -> None:
    shares = information_shares(values)
    assert math.fsum(shares) == pytest.approx(1.0, abs=1e-12)
    assert all(s >= 0 for s in shares)
    biggest = max(range(len(values)), key=values.__getitem__)
    assert shares[biggest] == max(shares)


def test_shares_reject_bad_input() -> None:
    for bad in ([], [0.0, 0.0], [1.0, -0.1], [1.0, math.inf]):
        with pytest.raises(InputError):
            information_shares(bad)


# --- existence of the expected information, decided per end --------------------------------

# Invented gamma mixture in the range of the crude pump failure rates x/t of Gaver &
# O'Muircheartaigh (1987, Technometrics 29:1; data recalled from memory), shaped like a
# MAP-type prior: both shapes below 1, so the second-smallest rate at log lambda -> -inf is
# below the Poisson unit information's rate 1.
PUMP_LIKE = (
    Component("gamma", {"a": 0.5, "scale": 1 / 0.4}, 0.4),
    Component("gamma", {"a": 0.8, "scale": 1 / 6.0}, 0.6),
)


def _even_betas(*shapes: tuple[float, float]) -> tuple[Component, ...]:
    return tuple(Component("beta", {"a": a, "b": b}, 1 / len(shapes)) for a, b in shapes)


def _beta_terms(phi: np.ndarray, a: float, b: float) -> tuple[np.ndarray, ...]:
    """Density of logit x under Beta(a, b), written out, and its analytic first two
    derivatives (x = expit(phi): f = x^a (1-x)^b / B(a, b))."""
    x = special.expit(phi)
    f = np.exp(a * phi - (a + b) * np.logaddexp(0, phi) - special.betaln(a, b))
    g = a - (a + b) * x
    return f, f * g, f * (g * g - (a + b) * x * (1 - x))


def _gamma_terms(phi: np.ndarray, a: float, rate: float) -> tuple[np.ndarray, ...]:
    """Density of log x under Gamma(a, rate): f = rate^a e^{a phi - rate e^phi} / Gamma(a)."""
    lam = np.exp(phi)
    f = np.exp(a * phi - rate * lam + a * math.log(rate) - special.gammaln(a))
    g = a - rate * lam
    return f, f * g, f * (g * g - rate * lam)


def _direct_elir(terms: list[tuple[float, tuple]], info, lo: float, hi: float, n: int) -> float:
    """Neuenschwander et al. (2020)'s definition written out: int p (-(log p)'') / i_F dphi
    with -(log p)'' = p'^2/p^2 - p''/p from analytic derivatives, by Simpson's rule."""
    phi = np.linspace(lo, hi, n)
    p = sum(w * t[0] for w, t in terms)
    d1 = sum(w * t[1] for w, t in terms)
    d2 = sum(w * t[2] for w, t in terms)
    return float(integrate.simpson((d1 * d1 / p - d2) / info(phi), x=phi))


@pytest.mark.parametrize(
    ("scale", "components", "direct", "hi"),
    [
        (
            "probability",
            (
                Component("beta", {"a": 3.0, "b": 1.2}, 0.45),
                Component("beta", {"a": 6.0, "b": 2.5}, 0.55),
            ),
            lambda phi: [(0.45, _beta_terms(phi, 3.0, 1.2)), (0.55, _beta_terms(phi, 6.0, 2.5))],
            40.0,
        ),
        (
            "rate",
            (
                Component("gamma", {"a": 1.5, "scale": 1 / 0.4}, 0.3),
                Component("gamma", {"a": 3.0, "scale": 1 / 6.0}, 0.7),
            ),
            lambda phi: [(0.3, _gamma_terms(phi, 1.5, 0.4)), (0.7, _gamma_terms(phi, 3.0, 6.0))],
            5.0,
        ),
    ],
)
def test_converging_mixture_matches_the_definition(
    scale: str, components: tuple, direct, hi: float
) -> None:
    """Second-smallest tail rate above the unit information's: the integral exists and
    matches a dense Simpson quadrature of the definition (Neuenschwander et al. 2020) on
    phi in [-60, hi], where the neglected tails are below exp(-30)."""
    info = (
        (lambda phi: special.expit(phi) * special.expit(-phi)) if scale == "probability" else np.exp
    )
    phi = np.linspace(-60, hi, 400_001)
    reference = _direct_elir(direct(phi), info, -60, hi, 400_001)
    value = ess_all(prior(scale, *components))["expected_information"]
    assert value == pytest.approx(reference, rel=1e-6)


@pytest.mark.parametrize(
    ("scale", "components", "likelihood", "ends"),
    [
        ("rate", PUMP_LIKE, None, {"lower"}),
        (  # second-smallest b below 1: the upper end only
            "probability",
            _even_betas((5.0, 0.5), (3.0, 0.9)),
            None,
            {"upper"},
        ),
        (  # second-smallest a below 1: the lower end only
            "probability",
            _even_betas((0.4, 5.0), (0.7, 8.0)),
            None,
            {"lower"},
        ),
        (  # polynomial tails against binomial information: both ends
            "logit",
            (Component("student_t", {"df": 4.0, "loc": 0.0, "scale": 1.0}),),
            None,
            {"lower", "upper"},
        ),
        (  # polynomial tails against Poisson information: only at -inf, where it vanishes
            "log",
            (Component("student_t", {"df": 4.0, "loc": 0.0, "scale": 1.0}),),
            "poisson",
            {"lower"},
        ),
    ],
)
def test_divergent_expected_information_is_none_with_the_end(
    scale: str, components: tuple, likelihood: str | None, ends: set[str]
) -> None:
    """The tail analysis in the module docstring (derived; the pump-like prior's quadrature
    used to report a finite number). None and a reason naming each divergent end."""
    values = ess_all(prior(scale, *components), likelihood=likelihood)
    assert values["expected_information"] is None
    note = values["notes"]["expected_information"]
    assert "does not exist" in note
    assert {end for end in ("lower", "upper") if f"{end} end" in note} == ends


def test_pump_like_truncated_integral_runs_away() -> None:
    """Independent evidence of the divergence: the definition, integrated by Simpson's rule
    on log lambda in [-L, 5], keeps falling as L grows (derived rate exp(-(0.8 - 1) L))."""
    direct = [(0.4, _gamma_terms), (0.6, _gamma_terms)]
    params = [(0.5, 0.4), (0.8, 6.0)]

    def truncated(lo: float) -> float:
        phi = np.linspace(lo, 5, 200_001)
        terms = [(w, f(phi, *q)) for (w, f), q in zip(direct, params, strict=True)]
        return _direct_elir(terms, np.exp, lo, 5, 200_001)

    values = [truncated(-length) for length in (20, 40, 60)]
    assert values[0] > values[1] > values[2]
    assert values[1] - values[2] > 10 * abs(values[0] - values[1]) / 10 > 1


def test_equal_slowest_rates_do_not_count() -> None:
    """Two betas with the same a = 0.5 < 1: their gradients agree to leading order at
    logit p -> -inf, so no cross term arises there and the ESS exists (derived)."""
    p = prior(
        "probability",
        Component("beta", {"a": 0.5, "b": 3.0}, 0.5),
        Component("beta", {"a": 0.5, "b": 6.0}, 0.5),
    )
    value = ess_all(p)["expected_information"]
    phi = np.linspace(-40, 40, 400_001)
    terms = [(0.5, _beta_terms(phi, 0.5, 3.0)), (0.5, _beta_terms(phi, 0.5, 6.0))]
    info = lambda t: special.expit(t) * special.expit(-t)  # noqa: E731
    assert value == pytest.approx(_direct_elir(terms, info, -40, 40, 400_001), rel=1e-5)


def test_cap_refuses_an_ess_that_does_not_exist() -> None:
    """A cap solved against a non-existent ESS would be a wrong number: it is an error
    naming the method and what to change."""
    with pytest.raises(NumericalError, match=r"does not exist.*set the cap on an ESS method"):
        solve_power_for_cap(lambda a: None, 10.0, method="expected_information")
    with pytest.raises(NumericalError, match=r"expected_information.*lower end.*another method"):
        power_for_ess_cap(
            lambda a: ess_all(prior("rate", *PUMP_LIKE)), 0.5, method="expected_information"
        )
    with pytest.raises(InputError):
        power_for_ess_cap(lambda a: {}, 1.0, method="elir")


# --- a distribution given by its log density ----------------------------------------------


def _on_phi(frozen, support: str):
    """The log density of phi = x, log x or logit x from a scipy distribution of x, with the
    Jacobian dx/dphi = 1, x or x(1-x)."""
    forward = {"real": lambda t: t, "positive": np.exp, "unit": special.expit}[support]
    log_jac = {
        "real": np.zeros_like,
        "positive": lambda t: t,
        "unit": lambda t: -np.logaddexp(0, t) - np.logaddexp(0, -t),
    }[support]
    return lambda t: frozen.logpdf(forward(t)) + log_jac(t)


@pytest.mark.parametrize("from_grid", [False, True])
@pytest.mark.parametrize(
    ("frozen", "scale", "support", "lo", "hi", "unit_sd", "expected"),
    [
        # Morita et al. (2008); Neuenschwander et al. (2020): Beta(a, b) has ESS a + b
        (stats.beta(3.0, 7.0), "probability", "unit", -25, 20, None, 10.0),
        # Gamma(shape 4, rate 20) for a Poisson rate: ESS = rate (recalled)
        (stats.gamma(4.0, scale=1 / 20), "rate", "positive", -14, 1.5, None, 20.0),
        # N(m, s^2), unit sd s_u = 2: ESS s_u^2 / s^2
        (stats.norm(0.7, 0.5), "identity", "real", -5, 6.4, 2.0, 16.0),
    ],
)
def test_ess_of_density_matches_the_closed_forms(
    frozen,
    scale: str,
    support: str,
    lo: float,
    hi: float,
    unit_sd,
    expected: float,
    from_grid: bool,
) -> None:
    logpdf = _on_phi(frozen, support)
    if from_grid:
        phi = np.linspace(lo, hi, 20_001)
        density = CanonicalDensity.from_grid(
            phi, logpdf(phi), support=support, mean=frozen.mean(), variance=frozen.var()
        )
    else:
        density = CanonicalDensity(logpdf, support, lo, hi, frozen.mean(), frozen.var())
    values = ess_of_density(density, scale, unit_sd=unit_sd)
    for method in METHODS:
        assert values[method] == pytest.approx(expected, rel=1e-4), method


def test_ess_of_density_refuses_a_range_that_cuts_the_mass() -> None:
    frozen = stats.norm(0.0, 1.0)
    narrow = CanonicalDensity(_on_phi(frozen, "real"), "real", -2.0, 2.0, 0.0, 1.0)
    values = ess_of_density(narrow, "identity", unit_sd=1.0)
    assert values["expected_information"] is None
    assert "widen" in values["notes"]["expected_information"]
    missing = CanonicalDensity(_on_phi(frozen, "real"), "real", -9.0, 9.0, 0.0, None)
    assert ess_of_density(missing, "identity", unit_sd=1.0)["variance_match"] is None


def test_beta_with_a_small_b_keeps_its_upper_tail() -> None:
    """Morita et al. (2008); Neuenschwander et al. (2020): Beta(a, b) has ESS a + b, here
    for a beta with 16% of its mass beyond logit p = 37."""
    p = prior("probability", Component("beta", {"a": 0.95, "b": 0.05}))
    assert ess(p, method="expected_information").value == pytest.approx(1.0, rel=1e-4)


# --- the quadrature's first Gauss-Kronrod rule, taken on every piece at once ------------------


def test_kronrod_rules_hold_the_gauss_rules_and_their_degree() -> None:
    """The Gauss nodes and weights inside the 21- and 15-point rules are numpy's
    Gauss-Legendre rules of 10 and 7 points; a Kronrod rule of 2n + 1 points integrates
    polynomials of degree 3n + 1 exactly (Piessens et al. 1983, QUADPACK, common practice)."""
    from registry.priors.ess import _KRONROD_15, _KRONROD_21

    for rule, n in ((_KRONROD_21, 10), (_KRONROD_15, 7)):
        x, w = np.polynomial.legendre.leggauss(n)
        gauss = sorted(
            (s * node, g) for node, _, g in rule if g for s in ((1, -1) if node else (1,))
        )
        assert np.allclose([p for p, _ in gauss], x, rtol=0, atol=1e-15)
        assert np.allclose([g for _, g in gauss], w, rtol=0, atol=1e-15)
        nodes = np.array([s * node for node, _, _ in rule for s in ((1, -1) if node else (1,))])
        weights = np.array([k for node, k, _ in rule for _ in ((1, -1) if node else (1,))])
        for degree in range(3 * n + 2):
            exact = (1 - (-1) ** (degree + 1)) / (degree + 1)
            assert weights @ nodes**degree == pytest.approx(exact, abs=1e-14)


@pytest.mark.parametrize("seed", range(3))
def test_first_kronrod_rule_on_all_pieces_is_what_quad_returns(seed: int) -> None:
    """On each finite piece and each half-line, where scipy's quad stops after its first
    rule (21 or 15 evaluations), the rule taken on all pieces at once says so too and gives
    quad's value; where quad goes on, it says so, and the ESS calls quad itself there."""
    from registry.priors.ess import _first_rules

    rng = np.random.default_rng(seed)
    dists = [
        stats.norm(m, s) for m, s in zip(rng.normal(0, 1, 3), rng.uniform(0.05, 2, 3), strict=True)
    ]
    weights = rng.dirichlet(np.ones(3))

    def f(x):
        return sum(
            w * d.pdf(x) * (1 + np.sin(3 * x)) ** 2 for w, d in zip(weights, dists, strict=True)
        )

    levels = [1e-6, 1e-3, 0.1, 0.5, 0.9, 1 - 1e-3, 1 - 1e-6]
    cuts = np.sort(np.concatenate([d.ppf(levels) for d in dists]))
    lo, hi = cuts[:-1], cuts[1:]
    inner, outer = _first_rules(f, cuts)
    pieces = [(a, b, inner, i, 21) for i, (a, b) in enumerate(zip(lo, hi, strict=True))]
    pieces += [(-np.inf, cuts[0], outer, 0, 15), (cuts[-1], np.inf, outer, 1, 15)]
    settled = 0
    for a, b, rule, i, first in pieces:
        value, error, info = integrate.quad(
            lambda x: float(f(x)), a, b, limit=500, epsabs=1e-11, epsrel=1e-10, full_output=1
        )[:3]
        assert bool(rule.settled()[i]) == (info["neval"] == first)
        if info["neval"] == first:
            settled += 1
            assert rule.value[i] == pytest.approx(value, rel=1e-14, abs=1e-300)
            assert rule.error[i] == pytest.approx(error, rel=1e-12)
    assert settled > len(pieces) // 2


def _normal_terms(phi: np.ndarray, m: float, s: float) -> tuple[np.ndarray, ...]:
    """Normal density and its analytic first two derivatives."""
    f = stats.norm.pdf(phi, m, s)
    g = -(phi - m) / s**2
    return f, f * g, f * (g * g - 1 / s**2)


@pytest.mark.parametrize(
    ("scale", "components", "terms", "info", "unit_sd"),
    [
        (  # narrow informative components and a wide robust one, normal data (sd 2)
            "identity",
            (
                Component("normal", {"loc": -0.24, "scale": 0.32}, 0.04),
                Component("normal", {"loc": -0.23, "scale": 0.09}, 0.5),
                Component("normal", {"loc": -0.24, "scale": 0.17}, 0.26),
                Component("normal", {"loc": -0.24, "scale": 2.0}, 0.2),
            ),
            lambda phi: [
                (0.04, _normal_terms(phi, -0.24, 0.32)),
                (0.5, _normal_terms(phi, -0.23, 0.09)),
                (0.26, _normal_terms(phi, -0.24, 0.17)),
                (0.2, _normal_terms(phi, -0.24, 2.0)),
            ],
            lambda phi: np.full_like(phi, 0.25),
            2.0,
        ),
        (  # gamma components on a rate with Poisson data, one of shape 1
            "rate",
            (
                Component("gamma", {"a": 380.0, "scale": 1 / 460.0}, 0.4),
                Component("gamma", {"a": 20.0, "scale": 1 / 25.0}, 0.5),
                Component("gamma", {"a": 1.0, "scale": 0.85}, 0.1),
            ),
            lambda phi: [
                (0.4, _gamma_terms(phi, 380.0, 460.0)),
                (0.5, _gamma_terms(phi, 20.0, 25.0)),
                (0.1, _gamma_terms(phi, 1.0, 1 / 0.85)),
            ],
            np.exp,
            None,
        ),
    ],
)
def test_elir_matches_adaptive_quadrature_of_the_definition(
    scale: str, components: tuple, terms, info, unit_sd: float | None
) -> None:
    """Neuenschwander et al. (2020)'s definition, int p (-(log p)'') / i_F dphi, written out
    with analytic derivatives and integrated by scipy's quad over the whole line (the tails
    as half-lines): the ESS agrees to 1e-9, far inside its stated accuracy."""

    def integrand(phi: float) -> float:
        parts = terms(np.array([phi]))
        p = sum(w * t[0] for w, t in parts)
        if p[0] == 0:
            return 0.0
        d1 = sum(w * t[1] for w, t in parts)
        d2 = sum(w * t[2] for w, t in parts)
        return float((d1 * d1 / p - d2)[0] / info(np.array([phi]))[0])

    centres = sorted({float(to_canonical(c.dist.support, c.dist.ppf(0.5))) for c in components})
    lo, hi = centres[0] - 10.0, centres[-1] + 10.0
    reference = (
        integrate.quad(integrand, -np.inf, lo, limit=500)[0]
        + integrate.quad(integrand, lo, hi, points=centres, limit=500, epsrel=1e-12)[0]
        + integrate.quad(integrand, hi, np.inf, limit=500)[0]
    )
    got = ess(prior(scale, *components), method="expected_information", unit_sd=unit_sd).value
    assert got == pytest.approx(reference, rel=1e-9)
