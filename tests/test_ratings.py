"""Relevance ratings and their discounts.

References: Ibrahim & Chen (2000, Statistical Science 15:46) for the power prior; Turner,
Spiegelhalter, Smith & Thompson (2009, JRSS A 172:21) for additive bias; scipy's quad and
normal density as the numerical reference.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats

from registry.errors import InputError
from registry.priors.ess import ess
from registry.priors.ratings import (
    BIAS_LEVELS,
    DEFAULT_MAPPING,
    DOMAINS,
    INDIRECTNESS_LEVELS,
    Discount,
    DiscountMapping,
    LevelDiscount,
    Rating,
    apply_normal,
    discount_for,
    levels_for,
)
from registry.values.prior import Component, Prior


def _all_best() -> list[Rating]:
    return [Rating(d, levels_for(d)[0], rule="default") for d in DOMAINS]


def _ratings(levels: dict[str, str]) -> list[Rating]:
    return [
        Rating(d, levels.get(d, levels_for(d)[0]), rationale="stated in the test", rule="test")
        for d in DOMAINS
    ]


# --- ratings ----------------------------------------------------------------------------------


def test_rationale_required_below_best_level() -> None:
    Rating("population", "direct")  # the best level needs none
    Rating("risk_of_bias", "low")
    with pytest.raises(InputError) as info:
        Rating("population", "serious", rationale="  ")
    assert info.value.field == "population"
    with pytest.raises(InputError) as info:
        Rating("risk_of_bias", "high")
    assert info.value.field == "risk_of_bias"


def test_levels_are_checked_per_domain() -> None:
    with pytest.raises(InputError) as info:
        Rating("risk_of_bias", "serious", rationale="x")
    assert info.value.field == "risk_of_bias"
    with pytest.raises(InputError):
        Rating("setting", "high", rationale="x")
    with pytest.raises(InputError):
        Rating("country", "direct")


def test_every_domain_rated_exactly_once() -> None:
    with pytest.raises(InputError) as info:
        discount_for(_all_best()[:-1])
    assert info.value.field == "risk_of_bias"
    with pytest.raises(InputError) as info:
        discount_for([*_all_best(), Rating("outcome", "direct")])
    assert info.value.field == "outcome"
    with pytest.raises(InputError):
        discount_for(_all_best(), mechanism="half")


def test_direct_low_risk_entry_is_not_discounted_by_default() -> None:
    assert discount_for(_all_best()) == Discount(1.0, 0.0, 0.0)


def test_power_factors_multiply_and_bias_variances_add() -> None:
    mapping = DEFAULT_MAPPING
    ratings = _ratings({"population": "serious", "setting": "minor", "risk_of_bias": "high"})
    d = discount_for(ratings, mapping, "both")
    parts = [
        mapping.get("population", "serious"),
        mapping.get("setting", "minor"),
        mapping.get("risk_of_bias", "high"),
    ]
    assert d.power == pytest.approx(math.prod(p.power for p in parts))
    assert d.bias_var == pytest.approx(sum(p.bias_var for p in parts))
    assert discount_for(ratings, mapping, "power") == Discount(power=d.power)
    assert discount_for(ratings, mapping, "bias") == Discount(bias_var=d.bias_var)


# --- the closed forms, against numerical integration -------------------------------------------


@pytest.mark.parametrize(("y", "se", "a"), [(0.3, 0.2, 0.5), (-1.2, 0.05, 0.1), (2.0, 1.5, 0.9)])
def test_power_weight_multiplies_normal_precision(y: float, se: float, a: float) -> None:
    """Ibrahim & Chen (2000): L(theta)^a for a normal likelihood is normal with precision
    a/se^2. Reference: the variance of the normalised L^a by scipy quad."""
    _, se_adj = apply_normal(y, se, Discount(power=a))
    lo, hi = y - 60 * se / math.sqrt(a), y + 60 * se / math.sqrt(a)

    def power_lik(t: float) -> float:
        return math.exp(a * stats.norm.logpdf(y, t, se))

    mass = integrate.quad(power_lik, lo, hi, points=[y])[0]
    mean = integrate.quad(lambda t: t * power_lik(t), lo, hi, points=[y])[0] / mass
    var = integrate.quad(lambda t: (t - mean) ** 2 * power_lik(t), lo, hi, points=[y])[0] / mass
    assert 1 / se_adj**2 == pytest.approx(a / se**2, rel=1e-12)
    assert se_adj**2 == pytest.approx(var, rel=1e-7)


@pytest.mark.parametrize(
    ("y", "se", "shift", "bias_var"), [(0.4, 0.1, 0.15, 0.04), (-0.7, 0.3, -0.2, 0.25)]
)
def test_additive_bias_adds_its_variance(
    y: float, se: float, shift: float, bias_var: float
) -> None:
    """Turner et al. (2009): y ~ N(theta + b, se^2), b ~ N(shift, v) integrates to
    y - shift ~ N(theta, se^2 + v). Reference: the integral over b by scipy quad."""
    y_adj, se_adj = apply_normal(y, se, Discount(bias_shift=shift, bias_var=bias_var))
    assert y_adj == pytest.approx(y - shift)
    for theta in (-1.0, 0.0, 0.3, 1.1):
        marginal = integrate.quad(
            lambda b, theta=theta: (
                stats.norm.pdf(y, theta + b, se) * stats.norm.pdf(b, shift, math.sqrt(bias_var))
            ),
            -np.inf,
            np.inf,
        )[0]
        assert stats.norm.pdf(y_adj, theta, se_adj) == pytest.approx(marginal, rel=1e-8)


def test_power_then_bias_order() -> None:
    """With both mechanisms, the power applies to the entry's own likelihood and the bias
    is integrated out afterwards: int N(y; theta + b, se^2)^a N(b; shift, v) db is
    proportional in theta to N(y - shift; theta, se^2/a + v). Reference: scipy quad."""
    y, se, a, shift, v = 0.5, 0.2, 0.4, 0.1, 0.03
    y_adj, se_adj = apply_normal(y, se, Discount(power=a, bias_shift=shift, bias_var=v))
    ratios = []
    for theta in (-0.5, 0.0, 0.4, 1.0):
        numeric = integrate.quad(
            lambda b, theta=theta: (
                math.exp(a * stats.norm.logpdf(y, theta + b, se))
                * stats.norm.pdf(b, shift, math.sqrt(v))
            ),
            -np.inf,
            np.inf,
        )[0]
        ratios.append(numeric / stats.norm.pdf(y_adj, theta, se_adj))
    assert max(ratios) == pytest.approx(min(ratios), rel=1e-7)


# --- mappings ---------------------------------------------------------------------------------


def _ladder(
    powers: list[float], sds: list[float], names: tuple[str, ...]
) -> dict[str, LevelDiscount]:
    return {n: LevelDiscount(p, s * s) for n, p, s in zip(names, powers, sds, strict=True)}


def test_custom_mapping_must_be_monotone() -> None:
    good = {d: DEFAULT_MAPPING.levels[d] for d in DOMAINS}
    bad_power = dict(
        good, outcome=_ladder([1, 0.5, 0.7, 0.2], [0, 0.1, 0.2, 0.3], INDIRECTNESS_LEVELS)
    )
    with pytest.raises(InputError) as info:
        DiscountMapping(bad_power)
    assert info.value.field == "outcome"
    bad_var = dict(good, risk_of_bias=_ladder([1, 0.8, 0.5], [0, 0.3, 0.1], BIAS_LEVELS))
    with pytest.raises(InputError) as info:
        DiscountMapping(bad_var)
    assert info.value.field == "risk_of_bias"
    out_of_range = dict(good, design=_ladder([1, 0.9, 0.6, 0.0], [0, 0, 0, 0], INDIRECTNESS_LEVELS))
    with pytest.raises(InputError) as info:
        DiscountMapping(out_of_range)
    assert info.value.field == "design"


def test_mapping_from_definition_overrides_base() -> None:
    m = DiscountMapping.from_dict({"setting": {"serious": {"power": 0.5, "bias_sd": 0.2}}})
    assert m.get("setting", "serious") == LevelDiscount(0.5, pytest.approx(0.04), 0.0)
    assert m.get("setting", "minor") == DEFAULT_MAPPING.get("setting", "minor")
    with pytest.raises(InputError) as info:  # very_serious would discount less than serious
        DiscountMapping.from_dict({"setting": {"very_serious": {"power": 0.7}}})
    assert info.value.field == "setting"
    with pytest.raises(InputError):
        DiscountMapping.from_dict({"setting": {"serious": {"bias_sd": 0.1, "bias_var": 0.01}}})
    with pytest.raises(InputError):
        DiscountMapping.from_dict({"setting": {"serious": {"weight": 0.1}}})


# --- property: a worse rating never narrows the prior nor raises its ESS ------------------------


@st.composite
def monotone_mappings(draw: st.DrawFn) -> DiscountMapping:
    levels = {}
    for domain in DOMAINS:
        k = len(levels_for(domain))
        powers = sorted(draw(st.lists(st.floats(0.05, 1.0), min_size=k, max_size=k)), reverse=True)
        variances = sorted(draw(st.lists(st.floats(0.0, 0.5), min_size=k, max_size=k)))
        levels[domain] = {
            name: LevelDiscount(p, v)
            for name, p, v in zip(levels_for(domain), powers, variances, strict=True)
        }
    return DiscountMapping(levels)


@settings(max_examples=60, deadline=None, derandomize=True)
@given(
    mapping=monotone_mappings(),
    entries=st.lists(
        st.tuples(
            st.floats(0.05, 2.0), st.dictionaries(st.sampled_from(DOMAINS), st.integers(0, 3))
        ),
        min_size=1,
        max_size=5,
    ),
    worsen=st.tuples(st.integers(0, 4), st.sampled_from(DOMAINS)),
    tau2=st.floats(0.0, 0.3),
    mechanism=st.sampled_from(["power", "bias", "both"]),
)
def test_worse_rating_never_narrows_nor_raises_ess(
    mapping: DiscountMapping, entries: list, worsen: tuple, tau2: float, mechanism: str
) -> None:
    """Pool the entries by inverse variance (common practice) into a normal prior; make one
    rating one level worse; the prior's sd must not fall and its ESS must not rise."""

    def level_of(domain: str, index: int) -> str:
        names = levels_for(domain)
        return names[min(index, len(names) - 1)]

    def pooled_sd(levels_per_entry: list[dict[str, str]]) -> float:
        precision = 0.0
        for (se, _), levels in zip(entries, levels_per_entry, strict=True):
            _, se_adj = apply_normal(0.0, se, discount_for(_ratings(levels), mapping, mechanism))
            precision += 1.0 / (se_adj**2 + tau2)
        return 1.0 / math.sqrt(precision)

    before = [{d: level_of(d, i) for d, i in spec.items()} for _, spec in entries]
    which, domain = worsen
    which %= len(entries)
    after = [dict(levels) for levels in before]
    names = levels_for(domain)
    current = names.index(after[which].get(domain, names[0]))
    after[which][domain] = names[min(current + 1, len(names) - 1)]

    sd_before, sd_after = pooled_sd(before), pooled_sd(after)
    assert sd_after >= sd_before * (1 - 1e-12)
    ess_values = []
    for sd in (sd_before, sd_after):
        prior = Prior("p", 1, "d", "identity", (Component("normal", {"loc": 0.0, "scale": sd}),))
        ess_values.append(ess(prior, method="variance_match", unit_sd=2.0).value)
    assert ess_values[1] <= ess_values[0] * (1 + 1e-12)
