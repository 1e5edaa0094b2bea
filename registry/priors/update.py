"""Robust mixtures and conjugate updates of mixture priors.

Robust mixture (Schmidli, Gsteiger, Roychoudhury, O'Hagan, Spiegelhalter & Neuenschwander
2014, Biometrics 70:1023): p(theta) = (1 - w) p_informative(theta) + w p_vague(theta). The
vague component defaults to a unit-information prior, one unit's worth of information
centred on the informative prior's mean (see `unit_information_component`).

Updating a mixture of conjugate components with data y gives a mixture of the updated
components, with weights w_j' proportional to w_j m_j(y), m_j the marginal likelihood of y
under component j (common practice for conjugate mixtures; used by Schmidli et al. 2014).
Weights are computed in log space and normalised with log-sum-exp. Terms of m_j(y) that are
the same for every component (binomial coefficients, y!) cancel and are left out.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Sequence

import numpy as np
from scipy import special, stats

from registry.errors import InputError
from registry.priors.ess import data_model
from registry.priors.value import Component


def _components(
    components: Iterable[Component], family: str | None = None
) -> tuple[Component, ...]:
    out = tuple(components)
    if not out:
        raise InputError("a prior needs at least one component", field="components")
    total = math.fsum(c.weight for c in out)
    if abs(total - 1.0) > 1e-9:
        raise InputError(f"component weights must sum to 1, got {total}", field="weight")
    if family is not None:
        for c in out:
            if c.family != family:
                raise InputError(
                    f"this update is conjugate for {family} components only, got {c.family}",
                    field="family",
                )
    return out


def with_vague_component(
    components: Iterable[Component], vague: Component, weight: float
) -> tuple[Component, ...]:
    """(1 - w) x informative mixture + w x vague (Schmidli et al. 2014).

    `weight` is the vague component's prior weight w in [0, 1); w = 0 returns the
    informative components unchanged. The vague component's own weight is ignored.
    """
    informative = _components(components)
    if not (math.isfinite(weight) and 0 <= weight < 1):
        raise InputError(f"the vague weight must be in [0, 1), got {weight}", field="weight")
    if vague.support != informative[0].support:
        raise InputError(
            f"the vague component ({vague.family}) must share the support of "
            f"the informative prior ({informative[0].family})",
            field="vague",
        )
    if weight == 0:
        return informative
    return (
        *(Component(c.family, c.params, (1.0 - weight) * c.weight) for c in informative),
        Component(vague.family, vague.params, weight),
    )


def unit_information_component(
    prior_mean: float,
    unit_sd: float | None,
    family: str,
    scale: str,
    *,
    likelihood: str | None = None,
) -> Component:
    """The default vague component: a prior worth one unit of data, at `prior_mean`.

    - normal on an analysis scale: normal(mean, s_u), with s_u = 1/sqrt(i_F(mean)) for one
      unit of the data model (`registry.priors.ess.data_model`): `unit_sd` for normal data,
      1/sqrt(p(1-p)) at p = expit(mean) on the logit scale, 1/sqrt(lambda) at
      lambda = exp(mean) on the log scale of a rate;
    - beta on the probability scale: Beta(m, 1 - m), so a + b = 1 and its mean is m;
    - gamma on the rate scale: shape m and rate 1 (one unit of exposure), so its mean is m.

    Each has an effective sample size of one unit by moment matching (a unit-information
    prior in the sense of Kass & Wasserman 1995, JASA 90:928, recalled from memory).
    """
    if not math.isfinite(prior_mean):
        raise InputError(f"the prior mean must be finite, got {prior_mean}", field="mean")
    if family == "normal":
        model = data_model(scale, unit_sd=unit_sd, likelihood=likelihood)
        sd = 1.0 / math.sqrt(float(model.information(prior_mean)))
        return Component("normal", {"loc": prior_mean, "scale": sd})
    if family == "beta":
        if scale != "probability" or not 0 < prior_mean < 1:
            raise InputError(
                "a beta unit-information component needs the probability scale "
                f"and a mean in (0, 1); got {scale}, {prior_mean}",
                field="mean",
            )
        return Component("beta", {"a": prior_mean, "b": 1.0 - prior_mean})
    if family == "gamma":
        if scale != "rate" or prior_mean <= 0:
            raise InputError(
                "a gamma unit-information component needs the rate scale and a "
                f"positive mean; got {scale}, {prior_mean}",
                field="mean",
            )
        return Component("gamma", {"a": prior_mean, "scale": 1.0})
    raise InputError(
        f"no unit-information component for family {family!r}; use normal, beta or gamma",
        field="family",
    )


def _reweighted(
    components: Sequence[Component],
    updated: Sequence[dict[str, float]],
    log_marginals: Sequence[float],
    family: str,
) -> tuple[Component, ...]:
    log_w = np.array(
        [math.log(c.weight) + lm for c, lm in zip(components, log_marginals, strict=True)]
    )
    weights = np.exp(log_w - special.logsumexp(log_w))
    # a component whose posterior weight underflows to zero carries no posterior mass
    keep = [j for j, w in enumerate(weights) if w > 0]
    total = math.fsum(float(weights[j]) for j in keep)
    return tuple(Component(family, updated[j], float(weights[j]) / total) for j in keep)


def update_normal(components: Iterable[Component], y: float, se: float) -> tuple[Component, ...]:
    """Posterior of a normal mixture after y ~ N(theta, se^2).

    Component j, N(m_j, s_j^2), becomes N((m_j/s_j^2 + y/se^2) / P_j, 1/P_j) with
    P_j = 1/s_j^2 + 1/se^2; its weight is proportional to w_j N(y; m_j, s_j^2 + se^2).
    """
    comps = _components(components, "normal")
    if not (math.isfinite(y) and math.isfinite(se) and se > 0):
        raise InputError(f"need a finite y and a positive se, got {y}, {se}", field="se")
    updated, log_marg = [], []
    for c in comps:
        m, s = c.params["loc"], c.params["scale"]
        precision = 1.0 / s**2 + 1.0 / se**2
        updated.append(
            {"loc": (m / s**2 + y / se**2) / precision, "scale": 1.0 / math.sqrt(precision)}
        )
        log_marg.append(float(stats.norm.logpdf(y, m, math.sqrt(s**2 + se**2))))
    return _reweighted(comps, updated, log_marg, "normal")


def update_beta(components: Iterable[Component], events: float, n: float) -> tuple[Component, ...]:
    """Posterior of a beta mixture after `events` of `n` (binomial).

    Beta(a_j, b_j) becomes Beta(a_j + x, b_j + n - x); its weight is proportional to
    w_j B(a_j + x, b_j + n - x) / B(a_j, b_j), the beta-binomial marginal without the
    binomial coefficient. Non-integer counts (power-discounted data) are accepted.
    """
    comps = _components(components, "beta")
    if not (math.isfinite(n) and n > 0 and 0 <= events <= n):
        raise InputError(f"need 0 <= events <= n and n > 0, got {events} of {n}", field="events")
    updated, log_marg = [], []
    for c in comps:
        a, b = c.params["a"], c.params["b"]
        updated.append({"a": a + events, "b": b + n - events})
        log_marg.append(float(special.betaln(a + events, b + n - events) - special.betaln(a, b)))
    return _reweighted(comps, updated, log_marg, "beta")


def update_gamma(
    components: Iterable[Component], events: float, exposure: float
) -> tuple[Component, ...]:
    """Posterior of a gamma mixture after `events` in `exposure` (Poisson, rate per unit).

    Gamma(shape a_j, rate b_j) becomes Gamma(a_j + x, b_j + E); its weight is proportional
    to w_j Gamma(a_j + x) / Gamma(a_j) b_j^a_j / (b_j + E)^(a_j + x), the negative-binomial
    marginal without the factor E^x / x!.
    """
    comps = _components(components, "gamma")
    if not (math.isfinite(exposure) and exposure > 0 and math.isfinite(events) and events >= 0):
        raise InputError(
            f"need events >= 0 and exposure > 0, got {events} in {exposure}", field="events"
        )
    updated, log_marg = [], []
    for c in comps:
        a, rate = c.params["a"], 1.0 / c.params["scale"]
        updated.append({"a": a + events, "scale": 1.0 / (rate + exposure)})
        log_marg.append(
            float(
                special.gammaln(a + events)
                - special.gammaln(a)
                + a * math.log(rate)
                - (a + events) * math.log(rate + exposure)
            )
        )
    return _reweighted(comps, updated, log_marg, "gamma")
