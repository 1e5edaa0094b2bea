"""Effective sample size (ESS) of a prior, with its unit, by three published methods.

An ESS says how many units of new data (participants, or units of exposure for a rate)
carry as much information as the prior. It needs a data model for one unit, given by
`data_model`:

- ``normal``: one unit is an observation on the analysis scale with sd ``unit_sd`` (s_u);
  Fisher information 1/s_u^2. Fisher's z has s_u = 1 by default (var z = 1/(n - 3),
  common practice);
- ``binomial``: one participant is a Bernoulli trial; information 1/(p(1-p)) on the
  probability scale and p(1-p) on the logit scale;
- ``poisson``: one unit of exposure of a Poisson process with rate lambda; information
  1/lambda on the rate scale and lambda on the log scale.

Methods:

- ``moment``: match the prior's mean and variance to the conjugate form. On the
  probability scale a beta, ESS = a + b = m(1-m)/v - 1; on the rate scale a gamma, ESS =
  its rate m/v, in units of exposure; on a real scale a normal, ESS = 1 / (v i_F(m)), i.e.
  s_u^2 / v, and on the logit scale s_u^2 = 1/(p(1-p)) at p = expit(prior mean), on the log
  scale of a rate s_u^2 = 1/lambda at lambda = exp(prior mean) (common practice).
- ``morita``: Morita, Thall & Mueller (2008, Biometrics 64:595). The ESS is the m for which
  an epsilon-information prior q_0 updated by m units has the prior's information
  -d^2/dx^2 log p(x) at the prior mean x_bar. In expectation over the prior predictive the
  m units add m i_F(x_bar) for every data model here, so
  ESS = (D_p(x_bar) - D_0(x_bar)) / i_F(x_bar), with D_0 the limit of q_0's curvature as
  its variance grows: 0 on the real line, -1/x^2 on (0, inf) (gamma, lognormal) and
  -1/x^2 - 1/(1-x)^2 on (0, 1) (beta). This gives a + b for Beta(a, b), the rate for a
  gamma and s_u^2/s^2 for a normal, as in the paper (recalled from memory; the D_0 limits
  are derived here). Where the prior's log density is less curved at its mean than q_0's,
  the paper's minimiser over m >= 0 is 0; we return 0 and say so in the details.
- ``elir``: expected local information ratio, Neuenschwander, Weber, Schmidli & O'Hagan
  (2020, Biometrics 76:578): ESS = E_prior[i_p(phi) / i_F(phi)], i_p = -d^2/dphi^2 log p(phi).
  We evaluate it on the likelihood's canonical parameter phi (the value itself for normal
  data, logit p for binomial, log lambda for Poisson), computing the prior's density of phi
  with its Jacobian. That choice is ours: there the beta and gamma identities
  (ESS = a + b, ESS = rate) hold for every a, b > 0 with a bounded integrand, whereas on the
  probability scale the same expectation diverges for a < 1, which the unit-information
  vague component of a robust mixture always has. The expectation is a sum over mixture
  components, each integrated by adaptive quadrature over its own quantile u in (0, 1).
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import integrate, optimize, special

from registry.errors import InputError, NumericalError
from registry.values.prior import Component, Prior

METHODS = ("variance_match", "curvature_at_mean", "expected_information")
LIKELIHOODS = ("normal", "binomial", "poisson")

# analysis scales each data model accepts, and the support a prior on that scale must have
_SCALES_FOR = {
    "normal": ("identity", "log", "logit", "fisher_z"),
    "binomial": ("probability", "logit"),
    "poisson": ("rate", "log"),
}
_SUPPORT_OF_SCALE = {"probability": "unit", "rate": "positive"}


@dataclass(frozen=True)
class DataModel:
    """What one unit of new data is: its likelihood, the prior's scale, s_u and the unit."""

    likelihood: str
    scale: str
    unit_sd: float | None
    unit: str

    def information(self, x: Any) -> Any:
        """Fisher information of one unit at x on the prior's scale."""
        x = np.asarray(x, dtype=float)
        if self.likelihood == "normal":
            return np.full_like(x, 1.0 / self.unit_sd**2)
        if self.scale == "probability":
            return 1.0 / (x * (1.0 - x))
        if self.scale == "logit":
            return special.expit(x) * special.expit(-x)
        if self.scale == "rate":
            return 1.0 / x
        return np.exp(x)

    def canonical_information(self, phi: Any) -> Any:
        """Fisher information of one unit at the canonical parameter phi."""
        phi = np.asarray(phi, dtype=float)
        if self.likelihood == "normal":
            return np.full_like(phi, 1.0 / self.unit_sd**2)
        if self.likelihood == "binomial":
            return special.expit(phi) * special.expit(-phi)
        return np.exp(phi)


def data_model(
    scale: str,
    *,
    unit_sd: float | None = None,
    likelihood: str | None = None,
    unit: str | None = None,
) -> DataModel:
    """Resolve the data model of one unit for a prior on `scale`.

    Without `likelihood`: a given `unit_sd` means normal data; else probability and logit
    mean binomial, rate means Poisson, Fisher's z means normal with s_u = 1. The identity
    and log scales need `unit_sd` (a log ratio) or, on the log scale, likelihood="poisson"
    (a log rate), because the scale alone does not say which.
    """
    if likelihood is None:
        if unit_sd is not None:
            likelihood = "normal"
        elif scale in ("probability", "logit"):
            likelihood = "binomial"
        elif scale == "rate":
            likelihood = "poisson"
        elif scale == "fisher_z":
            likelihood, unit_sd = "normal", 1.0
        else:
            raise InputError(
                f"the ESS of a prior on the {scale} scale needs unit_sd (the sd of one "
                "unit's observation on that scale)"
                + (" or likelihood='poisson' for a log rate" if scale == "log" else ""),
                field="unit_sd",
            )
    if likelihood not in LIKELIHOODS:
        raise InputError(
            f"likelihood must be one of {', '.join(LIKELIHOODS)}, got {likelihood!r}",
            field="likelihood",
        )
    if scale not in _SCALES_FOR[likelihood]:
        raise InputError(
            f"a {likelihood} data model takes a prior on the "
            f"{' or '.join(_SCALES_FOR[likelihood])} scale, not {scale}",
            field="scale",
        )
    if likelihood == "normal":
        if unit_sd is None and scale == "fisher_z":
            unit_sd = 1.0
        if unit_sd is None or not (math.isfinite(unit_sd) and unit_sd > 0):
            raise InputError(f"unit_sd must be finite and positive, got {unit_sd}", field="unit_sd")
    elif unit_sd is not None:
        raise InputError(
            f"a {likelihood} data model fixes the unit information; do not give unit_sd",
            field="unit_sd",
        )
    if unit is None:
        unit = "units of exposure" if likelihood == "poisson" else "participants"
    return DataModel(likelihood, scale, None if unit_sd is None else float(unit_sd), unit)


@dataclass(frozen=True)
class EssResult:
    """An effective sample size, the method that gave it, its unit and how it was got."""

    value: float
    method: str
    unit: str
    details: Mapping[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        return {
            "value": self.value,
            "method": self.method,
            "unit": self.unit,
            "details": dict(self.details),
        }


# --- log densities and their derivatives on the canonical coordinate -----------------------
# Each component is written on phi = identity (real support), log x (positive) or logit x
# (unit), so densities stay finite far into the tails. Returns log p(phi), d/dphi, d2/dphi2.

# The densities are written out (handbook forms) rather than called through scipy.stats,
# whose per-call overhead dominates quadrature.
_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


def _normal_terms(phi: np.ndarray, mu: float, s: float) -> tuple[np.ndarray, ...]:
    z = (phi - mu) / s
    return -0.5 * z * z - math.log(s) - _LOG_SQRT_2PI, -z / s, np.full_like(phi, -1.0 / s**2)


def _canonical_terms(c: Component, phi: np.ndarray) -> tuple[np.ndarray, ...]:
    p = c.params
    if c.family == "normal":
        return _normal_terms(phi, p["loc"], p["scale"])
    if c.family == "student_t":
        nu, d, s = p["df"], phi - p["loc"], p["scale"]
        denom = nu * s * s + d * d
        log_f = (
            special.gammaln((nu + 1) / 2)
            - special.gammaln(nu / 2)
            - 0.5 * math.log(nu * math.pi)
            - math.log(s)
            - (nu + 1) / 2 * np.log1p(d * d / (nu * s * s))
        )
        return (log_f, -(nu + 1) * d / denom, -(nu + 1) * (nu * s * s - d * d) / denom**2)
    if c.family == "lognormal":  # log x is normal(log scale, s)
        return _normal_terms(phi, math.log(p["scale"]), p["s"])
    if c.family == "gamma":  # density of log x: a phi - e^phi / scale - log Gamma(a) - a log scale
        a, scale = p["a"], p["scale"]
        lam = np.exp(phi)
        return (
            a * phi - lam / scale - special.gammaln(a) - a * math.log(scale),
            a - lam / scale,
            -lam / scale,
        )
    # beta; density of logit x: a phi - (a + b) log(1 + e^phi) - log B(a, b)
    a, b = p["a"], p["b"]
    x = special.expit(phi)
    return (
        a * phi - (a + b) * np.logaddexp(0.0, phi) - special.betaln(a, b),
        a - (a + b) * x,
        -(a + b) * x * (1.0 - x),
    )


def _mixture_derivatives(
    components: tuple[Component, ...], phi: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """d/dphi log p and -d2/dphi2 log p for p(phi) = sum_j w_j f_j(phi).

    With responsibilities r_j, log-density gradients g_j and curvatures h_j:
    d log p = sum_j r_j g_j and d2 log p = sum_j r_j (h_j + g_j^2) - (sum_j r_j g_j)^2
    (differentiating the log of a sum).
    """
    terms = [_canonical_terms(c, phi) for c in components]
    log_r = np.stack([math.log(c.weight) + t[0] for c, t in zip(components, terms, strict=True)])
    r = np.exp(log_r - log_r.max(axis=0))
    r /= r.sum(axis=0)
    g = np.stack([t[1] for t in terms])
    h = np.stack([t[2] for t in terms])
    mean_g = np.sum(r * g, axis=0)
    return mean_g, -(np.sum(r * (h + g * g), axis=0) - mean_g * mean_g)


def _canonical_quantile(c: Component, u: float) -> float:
    """The canonical coordinate of component c's u-quantile, by scipy.special inverses."""
    p = c.params
    if c.family == "normal":
        return p["loc"] + p["scale"] * float(special.ndtri(u))
    if c.family == "student_t":
        return p["loc"] + p["scale"] * float(special.stdtrit(p["df"], u))
    if c.family == "lognormal":
        return math.log(p["scale"]) + p["s"] * float(special.ndtri(u))
    x = (
        float(special.gammaincinv(p["a"], u)) * p["scale"]
        if c.family == "gamma"
        else float(special.betaincinv(p["a"], p["b"], u))
    )
    return float(_to_canonical(c.support, x))


def _to_canonical(support: str, x: Any) -> Any:
    if support == "unit":
        return special.logit(x)
    if support == "positive":
        return np.log(x)
    return np.asarray(x, dtype=float)


def _curvature_on_scale(prior: Prior, x: float) -> float:
    """-d2/dx2 log p(x) on the prior's own scale, from the canonical terms by the chain rule.

    With x = T(phi), J = T'(phi): log p_x = log p_phi - log J, so with G = d/dphi log p_x,
    d2/dx2 log p_x = G'/J^2 - G J'/J^3.
    """
    support = prior.components[0].support
    grad, curv = _mixture_derivatives(prior.components, np.atleast_1d(_to_canonical(support, x)))
    grad_phi, curv_phi = float(grad[0]), float(curv[0])
    if support == "real":
        return curv_phi
    if support == "positive":  # T = exp: J = J' = x, (log J)' = 1, (log J)'' = 0
        jac, djac, dlogj, d2logj = x, x, 1.0, 0.0
    else:  # T = expit: J = x(1-x), J' = J(1-2x), (log J)' = 1-2x, (log J)'' = -2J
        jac = x * (1.0 - x)
        djac, dlogj, d2logj = jac * (1.0 - 2.0 * x), 1.0 - 2.0 * x, -2.0 * jac
    big_g = grad_phi - dlogj
    big_g_prime = -curv_phi - d2logj
    return -(big_g_prime / jac**2 - big_g * djac / jac**3)


# curvature of the epsilon-information prior in the limit of infinite variance (derived)
def _vague_limit_curvature(support: str, x: float) -> float:
    if support == "unit":
        return -1.0 / x**2 - 1.0 / (1.0 - x) ** 2
    if support == "positive":
        return -1.0 / x**2
    return 0.0


def _check_support(prior: Prior) -> None:
    wanted = _SUPPORT_OF_SCALE.get(prior.scale, "real")
    if prior.components[0].support != wanted:
        raise InputError(
            f"a prior on the {prior.scale} scale needs a {wanted}-valued "
            f"family, got {prior.components[0].family}",
            field="family",
        )


def _moment(prior: Prior, model: DataModel) -> tuple[float, dict[str, Any]]:
    m, v = prior.mean(), prior.var()
    if not math.isfinite(v):
        raise NumericalError(
            "the prior has no finite variance (a Student-t with df <= 2?), "
            "so moment matching is undefined; use method='expected_information'"
        )
    if model.scale == "probability":
        value = m * (1.0 - m) / v - 1.0
        return value, {"matched": "beta", "a": m * value, "b": (1.0 - m) * value}
    if model.scale == "rate":
        return m / v, {"matched": "gamma", "a": m * m / v, "rate": m / v}
    unit_var = 1.0 / float(model.information(m))
    return unit_var / v, {
        "matched": "normal",
        "unit_variance": unit_var,
        "unit_variance_at": "prior mean" if model.likelihood != "normal" else "fixed",
    }


def _morita(prior: Prior, model: DataModel) -> tuple[float, dict[str, Any]]:
    x_bar = prior.mean()
    if not math.isfinite(x_bar):
        raise NumericalError(
            "the prior has no finite mean (a Student-t with df <= 1?), so "
            "the method of Morita et al. has no point to work at; use "
            "method='expected_information'"
        )
    d_p = _curvature_on_scale(prior, x_bar)
    d_0 = _vague_limit_curvature(prior.components[0].support, x_bar)
    value = (d_p - d_0) / float(model.information(x_bar))
    details: dict[str, Any] = {"at": "prior mean", "x": x_bar, "prior_information": d_p}
    if value < 0:
        details["note"] = (
            "the prior's log density is less curved at its mean than the "
            "epsilon-information prior's; the method's minimiser is m = 0"
        )
        value = 0.0
    return value, details


def _elir(prior: Prior, model: DataModel) -> tuple[float, dict[str, Any]]:
    if model.likelihood != "normal" and any(c.family == "student_t" for c in prior.components):
        raise NumericalError(
            "the expected local information ratio diverges for a Student-t prior under a "
            f"{model.likelihood} likelihood (its tails outweigh the vanishing unit "
            "information); use method='variance_match' or approximate the prior by normals"
        )
    components = prior.components

    def ratio(phi: np.ndarray) -> np.ndarray:
        return _mixture_derivatives(components, phi)[1] / model.canonical_information(phi)

    total, err = 0.0, 0.0
    for c in components:
        dist = c.dist.frozen()

        def integrand(u: float, c: Component = c) -> float:
            # clip keeps exp/expit finite where a quantile underflows to a boundary
            phi = min(max(_canonical_quantile(c, u), -700.0), 700.0)
            return float(ratio(np.array([phi]))[0])

        # where the other components' mass lies, in this component's quantiles: the
        # curvature of the mixture changes fast there
        # (break points very near 0 or 1 would only make slivers)
        breaks = sorted(
            u
            for u in {
                float(dist.cdf(o.dist.frozen().ppf(q)))
                for o in components
                if o is not c
                for q in (1e-3, 0.5, 1 - 1e-3)
            }
            if 1e-6 < u < 1 - 1e-6
        )
        with warnings.catch_warnings():
            # quad's own warnings are replaced by the error check below
            warnings.simplefilter("ignore", integrate.IntegrationWarning)
            value, abserr = integrate.quad(
                integrand, 0.0, 1.0, points=breaks or None, limit=500, epsabs=1e-9, epsrel=1e-8
            )
        total += c.weight * value
        err += c.weight * abserr
    if not math.isfinite(total) or err > 1e-4 * max(1.0, abs(total)):
        raise NumericalError(
            f"the quadrature for the expected local information ratio did "
            f"not settle (estimate {total:.6g}, error {err:.2g}); try "
            "method='variance_match' or a mixture with fewer, wider components"
        )
    parameter = {
        "normal": "value on the analysis scale",
        "binomial": "logit p",
        "poisson": "log rate",
    }[model.likelihood]
    return total, {"parameter": parameter, "quadrature_error": err}


_METHOD_FUNCTIONS: dict[str, Callable[[Prior, DataModel], tuple[float, dict[str, Any]]]] = {
    "variance_match": _moment,
    "curvature_at_mean": _morita,
    "expected_information": _elir,
}


def ess(
    prior: Prior,
    *,
    method: str,
    unit_sd: float | None = None,
    likelihood: str | None = None,
    unit: str | None = None,
) -> EssResult:
    """The effective sample size of `prior` by one method (see the module docstring).

    `unit_sd`, `likelihood` and `unit` define one unit of data, as in `data_model`.
    """
    if method not in METHODS:
        raise InputError(
            f"method must be one of {', '.join(METHODS)}, got {method!r}", field="method"
        )
    model = data_model(prior.scale, unit_sd=unit_sd, likelihood=likelihood, unit=unit)
    _check_support(prior)
    value, details = _METHOD_FUNCTIONS[method](prior, model)
    details = {"likelihood": model.likelihood, "unit_sd": model.unit_sd, **details}
    return EssResult(float(value), method, model.unit, details)


def ess_all(
    prior: Prior,
    unit_sd: float | None = None,
    unit: str | None = None,
    likelihood: str | None = None,
) -> dict[str, Any]:
    """Every method's ESS with the unit: {"unit", "likelihood", "unit_sd", "variance_match",
    "curvature_at_mean", "expected_information", "notes"}.

    A method that cannot give a number for this prior has value None and its reason under
    "notes"; a method whose value carries a caveat has the caveat there too.
    """
    model = data_model(prior.scale, unit_sd=unit_sd, likelihood=likelihood, unit=unit)
    out: dict[str, Any] = {
        "unit": model.unit,
        "likelihood": model.likelihood,
        "unit_sd": model.unit_sd,
    }
    notes: dict[str, str] = {}
    for method in METHODS:
        try:
            result = ess(
                prior,
                method=method,
                unit_sd=model.unit_sd,
                likelihood=model.likelihood,
                unit=model.unit,
            )
        except NumericalError as exc:
            out[method] = None
            notes[method] = str(exc)
            continue
        out[method] = result.value
        if "note" in result.details:
            notes[method] = result.details["note"]
    out["notes"] = notes
    return out


def solve_power_for_cap(
    ess_of_power: Callable[[float], float], cap: float, *, tol: float = 0.005
) -> float:
    """The global power weight a in (0, 1] whose prior has ESS equal to `cap`.

    ESS is taken to increase with a (a power weight scales information). Returns 1.0 when
    ESS(1) <= cap; otherwise brackets the root by decades down to 1e-10, solves
    ESS(a) = cap by Brent's method and checks that the ESS at the answer is within `tol`
    (relative) of the cap.
    """
    if not (math.isfinite(cap) and cap > 0):
        raise InputError(f"an ESS cap must be finite and positive, got {cap}", field="cap")
    if not 0 < tol < 0.01:
        raise InputError(f"the tolerance must be in (0, 0.01), got {tol}", field="tol")
    if ess_of_power(1.0) <= cap:
        return 1.0
    # bracket by decades, so that extreme weights are only tried when needed
    high = 1.0
    for low in (10.0**-k for k in range(1, 11)):
        if ess_of_power(low) <= cap:
            break
        high = low
    else:
        raise NumericalError(
            f"even a global power weight of {low:g} leaves the ESS above "
            f"the cap {cap:g}; check the cap and its unit"
        )
    a = float(
        optimize.brentq(
            lambda w: ess_of_power(w) / cap - 1.0, low, high, xtol=1e-14, rtol=1e-12, maxiter=200
        )
    )
    reached = ess_of_power(a)
    if abs(reached / cap - 1.0) > tol:
        raise NumericalError(
            f"the ESS at power weight {a:.6g} is {reached:.6g}, not within "
            f"{tol:.1%} of the cap {cap:g}; the ESS may not rise smoothly "
            "with the weight: try another ESS method"
        )
    return a


def information_shares(contributions: Iterable[float]) -> tuple[float, ...]:
    """Each entry's share of the prior's information, summing to one.

    For a normal model, pass each entry's discounted precision
    1 / (se_i^2 / a_i + v_i + tau^2), with a_i its power weight and v_i its bias variance
    (`registry.priors.ratings.apply_normal` gives se_i^2 / a_i + v_i); under inverse-variance
    weighting that precision is its weight in the pooled mean (common practice).
    """
    values = [float(c) for c in contributions]
    if not values:
        raise InputError("no contributions to share", field="entries")
    for i, v in enumerate(values):
        if not (math.isfinite(v) and v >= 0):
            raise InputError(f"contribution {i} must be finite and >= 0, got {v}", field="entries")
    total = math.fsum(values)
    if total <= 0:
        raise InputError("the contributions sum to zero", field="entries")
    return tuple(v / total for v in values)
