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

In every pairing of prior scale and data model that `data_model` accepts, the canonical
coordinate of the prior's support (phi = x, log x or logit x;
`registry.values.families.to_canonical`) is the likelihood's canonical parameter, so one
coordinate serves both the prior's density and the unit information i_F(phi).

Methods (keys of `METHODS`):

- ``variance_match``: moment matching to the conjugate form (common practice). On the
  probability scale a beta, ESS = a + b = m(1-m)/v - 1; on the rate scale a gamma, ESS = its
  rate m/v, in units of exposure; on a real scale a normal, ESS = 1 / (v i_F(m)), i.e.
  s_u^2 / v, with i_F at the prior mean for binomial or Poisson data. Needs a finite variance.
- ``curvature_at_mean``: the method of Morita, Thall & Mueller (2008, Biometrics 64:595). The
  ESS is the m for which an epsilon-information prior q_0 updated by m units has the prior's
  information -d^2/dx^2 log p(x) at the prior mean x_bar. In expectation over the prior
  predictive the m units add m i_F(x_bar) for every data model here, so
  ESS = (D_p(x_bar) - D_0(x_bar)) / i_F(x_bar), with D_0 the limit of q_0's curvature as its
  variance grows. The limits of Beta(e, e), Gamma(e, rate e) and N(0, 1/e) as e -> 0 are all
  flat in phi, so D_0 is the curvature on the x scale of a density flat in phi: 0 on the real
  line, -1/x^2 on (0, inf) and -1/x^2 - 1/(1-x)^2 on (0, 1) (derived here). This gives a + b
  for Beta(a, b), the rate for a gamma and s_u^2/s^2 for a normal, as in the paper (recalled
  from memory). Where the prior is less curved at its mean than q_0, the paper's minimiser
  over m >= 0 is 0; we return 0 and say so. Needs a finite mean.
- ``expected_information``: the expected local information ratio of Neuenschwander, Weber,
  Schmidli & O'Hagan (2020, Biometrics 76:578): ESS = E_prior[i_p(phi) / i_F(phi)],
  i_p = -d^2/dphi^2 log p(phi). We evaluate it on the likelihood's canonical parameter phi,
  where the beta and gamma identities (ESS = a + b, ESS = rate) hold for every a, b > 0 with
  a bounded integrand (on the probability scale the same expectation diverges for a < 1).
  That choice of coordinate is ours.

Existence of the expected information (derived here, see `_divergence`). At an end of the
phi line let the components' densities of phi decay like exp(-c_j |phi|) (`tail_rates`:
infinite for normal-type tails, the shape for beta and gamma, 0 for Student-t polynomial
tails) and the unit information like exp(-d |phi|) (d = 0 for normal data, 1 for binomial
data at both ends and Poisson data at -inf, -1 for Poisson data at +inf where it grows).
With responsibilities r_j and log-density gradients g_j of the components,
i_p = -sum_j r_j h_j - Var_r(g): the variance term, between the slowest tail c_1 and the
next slower distinct finite rate c_2 > c_1, is of order exp(-(c_2 - c_1)|phi|) (c_2 - c_1)^2,
so p i_p / i_F has a term of order exp(-(c_2 - d)|phi|), and the expectation diverges (to
-inf) when c_2 <= d. Components with equal rates cancel in the gradient to leading order and
do not count. A polynomial tail (c = 0) makes the component's own term of order
|phi|^-(df+3) exp(d |phi|), which diverges for d > 0. The beta and gamma own terms are
bounded multiples of their densities (their curvature decays like the conjugate unit
information). Existence is decided from these rates at each end before integrating; where
it fails, or the quadrature does not reach its stated accuracy, there is no number.
"""

from __future__ import annotations

import itertools
import math
import warnings
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import integrate, interpolate, optimize

from registry.errors import InputError, NumericalError
from registry.values.families import to_canonical
from registry.values.prior import Component, Prior
from registry.values.scales import SUPPORT

METHODS = ("variance_match", "curvature_at_mean", "expected_information")

# relative accuracy the expected information is computed to, or refused
EXPECTED_INFORMATION_RTOL = 1e-4

Derivatives = Callable[[np.ndarray], tuple[np.ndarray, np.ndarray]]


@dataclass(frozen=True)
class _Likelihood:
    """One unit of data: the prior scales it takes, its unit information on its canonical
    parameter phi (for s_u = 1), and how fast that information decays at each end of phi
    (negative where it grows)."""

    scales: tuple[str, ...]
    parameter: str
    unit: str
    log_information: Callable[[np.ndarray], np.ndarray]
    decay: tuple[float, float]
    takes_unit_sd: bool


# log Fisher information of one unit: a Bernoulli trial on logit p has p(1-p), one unit of
# exposure of a Poisson process on log lambda has lambda, a normal observation 1/s_u^2
# (handbook; here for s_u = 1).
_LIKELIHOODS: dict[str, _Likelihood] = {
    "normal": _Likelihood(
        ("identity", "log", "logit", "fisher_z"),
        "value on the analysis scale",
        "participants",
        np.zeros_like,
        (0.0, 0.0),
        True,
    ),
    "binomial": _Likelihood(
        ("probability", "logit"),
        "logit p",
        "participants",
        lambda phi: -np.logaddexp(0.0, phi) - np.logaddexp(0.0, -phi),
        (1.0, 1.0),
        False,
    ),
    "poisson": _Likelihood(
        ("rate", "log"), "log rate", "units of exposure", np.array, (1.0, -1.0), False
    ),
}
LIKELIHOODS = tuple(_LIKELIHOODS)

# the data model a scale implies when none is given, and the s_u it fixes
_DEFAULT_LIKELIHOOD = {"probability": "binomial", "logit": "binomial", "rate": "poisson"}
_DEFAULT_UNIT_SD = {"fisher_z": 1.0}
_AMBIGUITY_HINT = {"log": " or likelihood='poisson' for a log rate"}
_ENDS = ("lower", "upper")


@dataclass(frozen=True)
class _Coordinate:
    """x = T(phi) on one support: the Jacobian J = dx/dphi and (log J)', (log J)'' in phi,
    each as a function of x."""

    jacobian: Callable[[float], float]
    dlog_jacobian: Callable[[float], float]
    d2log_jacobian: Callable[[float], float]


# T = identity, exp (J = x) and expit (J = x(1-x), (log J)' = 1-2x, (log J)'' = -2J)
_COORDINATES: dict[str, _Coordinate] = {
    "real": _Coordinate(lambda x: 1.0, lambda x: 0.0, lambda x: 0.0),
    "positive": _Coordinate(lambda x: x, lambda x: 1.0, lambda x: 0.0),
    "unit": _Coordinate(
        lambda x: x * (1.0 - x), lambda x: 1.0 - 2.0 * x, lambda x: -2.0 * x * (1.0 - x)
    ),
}


@dataclass(frozen=True)
class DataModel:
    """What one unit of new data is: its likelihood, the prior's scale, s_u and the unit."""

    likelihood: str
    scale: str
    unit_sd: float | None
    unit: str

    @property
    def _spec(self) -> _Likelihood:
        return _LIKELIHOODS[self.likelihood]

    def log_canonical_information(self, phi: Any) -> Any:
        """log Fisher information of one unit at the canonical parameter phi."""
        sd = 1.0 if self.unit_sd is None else self.unit_sd
        return self._spec.log_information(np.asarray(phi, dtype=float)) - 2.0 * math.log(sd)

    def canonical_information(self, phi: Any) -> Any:
        """Fisher information of one unit at the canonical parameter phi."""
        return np.exp(self.log_canonical_information(phi))

    def information(self, x: Any) -> Any:
        """Fisher information of one unit at x on the prior's scale: i_F(phi) / J(x)^2."""
        support = SUPPORT[self.scale]
        x = np.asarray(x, dtype=float)
        jacobian = np.vectorize(_COORDINATES[support].jacobian, otypes=[float])(x)
        return self.canonical_information(to_canonical(support, x)) / jacobian**2


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
        if unit_sd is not None or scale in _DEFAULT_UNIT_SD:
            likelihood = "normal"
        elif scale in _DEFAULT_LIKELIHOOD:
            likelihood = _DEFAULT_LIKELIHOOD[scale]
        else:
            raise InputError(
                f"the ESS of a prior on the {scale} scale needs unit_sd (the sd of one "
                f"unit's observation on that scale){_AMBIGUITY_HINT.get(scale, '')}",
                field="unit_sd",
            )
    spec = _LIKELIHOODS.get(likelihood)
    if spec is None:
        raise InputError(
            f"likelihood must be one of {', '.join(LIKELIHOODS)}, got {likelihood!r}",
            field="likelihood",
        )
    if scale not in spec.scales:
        raise InputError(
            f"a {likelihood} data model takes a prior on the "
            f"{' or '.join(spec.scales)} scale, not {scale}",
            field="scale",
        )
    if spec.takes_unit_sd:
        unit_sd = _DEFAULT_UNIT_SD.get(scale) if unit_sd is None else unit_sd
        if unit_sd is None or not (math.isfinite(unit_sd) and unit_sd > 0):
            raise InputError(f"unit_sd must be finite and positive, got {unit_sd}", field="unit_sd")
    elif unit_sd is not None:
        raise InputError(
            f"a {likelihood} data model fixes the unit information; do not give unit_sd",
            field="unit_sd",
        )
    return DataModel(
        likelihood, scale, None if unit_sd is None else float(unit_sd), unit or spec.unit
    )


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


# --- what the three methods need of a distribution ---------------------------------------


@dataclass(frozen=True)
class _Subject:
    """A distribution as the methods see it: support, mean and variance on the prior's own
    scale (None where they do not exist, with the reason), the gradient and curvature
    -d2/dphi2 of its log density of phi, and its expected information ratio."""

    support: str
    mean: float | None
    variance: float | None
    missing_moment: str
    derivatives: Derivatives
    expected_information: Callable[[DataModel], tuple[float, dict[str, Any]]]


def _mixture_derivatives(
    components: tuple[Component, ...], phi: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """d/dphi log p and -d2/dphi2 log p for p(phi) = sum_j w_j f_j(phi).

    With responsibilities r_j, log-density gradients g_j and curvatures h_j:
    d log p = sum_j r_j g_j and d2 log p = sum_j r_j (h_j + g_j^2) - (sum_j r_j g_j)^2
    (differentiating the log of a sum).
    """
    terms = [c.dist.canonical_terms(phi) for c in components]
    log_r = np.stack([math.log(c.weight) + t[0] for c, t in zip(components, terms, strict=True)])
    r = np.exp(log_r - log_r.max(axis=0))
    r /= r.sum(axis=0)
    g = np.stack([t[1] for t in terms])
    h = np.stack([t[2] for t in terms])
    mean_g = np.sum(r * g, axis=0)
    return mean_g, -(np.sum(r * (h + g * g), axis=0) - mean_g * mean_g)


def _curvature_on_scale(subject: _Subject, x: float) -> float:
    """-d2/dx2 log p(x) on the prior's own scale, from the canonical terms by the chain rule.

    With x = T(phi), J = T'(phi): log p_x = log p_phi - log J =: L, so
    d2/dx2 log p_x = (L'' - L' (log J)') / J^2.
    """
    coordinate = _COORDINATES[subject.support]
    grad, curv = subject.derivatives(np.atleast_1d(to_canonical(subject.support, x)))
    slope = float(grad[0]) - coordinate.dlog_jacobian(x)
    bend = -float(curv[0]) - coordinate.d2log_jacobian(x)
    return -(bend - slope * coordinate.dlog_jacobian(x)) / coordinate.jacobian(x) ** 2


def _flat(phi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Gradient and curvature of a density flat in phi (the epsilon-information limit)."""
    return np.zeros_like(phi), np.zeros_like(phi)


def _match_beta(m: float, v: float, model: DataModel) -> tuple[float, dict[str, Any]]:
    """Beta with mean m and variance v: a + b = m(1-m)/v - 1 (handbook moments)."""
    n = m * (1.0 - m) / v - 1.0
    return n, {"matched": "beta", "a": m * n, "b": (1.0 - m) * n}


def _match_gamma(m: float, v: float, model: DataModel) -> tuple[float, dict[str, Any]]:
    """Gamma with mean m and variance v: rate m/v, shape m^2/v (handbook moments)."""
    return m / v, {"matched": "gamma", "a": m * m / v, "rate": m / v}


def _match_normal(m: float, v: float, model: DataModel) -> tuple[float, dict[str, Any]]:
    """Normal: ESS = s_u^2 / v with s_u^2 = 1 / i_F(m)."""
    unit_var = 1.0 / float(model.information(m))
    fixed = _LIKELIHOODS[model.likelihood].takes_unit_sd
    return unit_var / v, {
        "matched": "normal",
        "unit_variance": unit_var,
        "unit_variance_at": "fixed" if fixed else "prior mean",
    }


# the conjugate form each support is matched to
_CONJUGATE_MATCH = {"unit": _match_beta, "positive": _match_gamma, "real": _match_normal}


def _variance_match(subject: _Subject, model: DataModel) -> tuple[float, dict[str, Any]]:
    if subject.mean is None or subject.variance is None:
        raise NumericalError(
            f"{subject.missing_moment}, so variance_match is undefined; use expected_information"
        )
    return _CONJUGATE_MATCH[subject.support](subject.mean, subject.variance, model)


def _curvature_at_mean(subject: _Subject, model: DataModel) -> tuple[float, dict[str, Any]]:
    x_bar = subject.mean
    if x_bar is None:
        raise NumericalError(
            f"{subject.missing_moment}, so curvature_at_mean has no point to work at; use "
            "expected_information"
        )
    d_p = _curvature_on_scale(subject, x_bar)
    d_0 = _curvature_on_scale(
        _Subject(subject.support, x_bar, None, "", _flat, subject.expected_information), x_bar
    )
    value = (d_p - d_0) / float(model.information(x_bar))
    details: dict[str, Any] = {"at": "prior mean", "x": x_bar, "prior_information": d_p}
    if value < 0:
        details["note"] = (
            "the prior's log density is less curved at its mean than the "
            "epsilon-information prior's; the method's minimiser is m = 0"
        )
        value = 0.0
    return value, details


def _expected_information(subject: _Subject, model: DataModel) -> tuple[float, dict[str, Any]]:
    value, details = subject.expected_information(model)
    return value, {"parameter": _LIKELIHOODS[model.likelihood].parameter, **details}


_METHOD_FUNCTIONS: dict[str, Callable[[_Subject, DataModel], tuple[float, dict[str, Any]]]] = {
    "variance_match": _variance_match,
    "curvature_at_mean": _curvature_at_mean,
    "expected_information": _expected_information,
}


# --- existence and quadrature of the expected information of a mixture -------------------


def _divergence(rates: Iterable[float], decay: float) -> str | None:
    """Why E[i_p / i_F] diverges at one end, or None where it converges (module docstring).

    `rates` are the components' exponential tail rates of the density of phi at that end,
    `decay` the unit information's rate there.
    """
    rates = sorted(rates)
    if decay > 0 and rates[0] == 0:
        return (
            "a component has a polynomial (Student-t) tail there, against a unit "
            f"information that vanishes like exp(-{decay:g}|phi|)"
        )
    slower = [c for c in rates if rates[0] < c < math.inf]
    if slower and slower[0] <= decay:
        return (
            f"the two slowest distinct tail rates there are {rates[0]:.4g} and "
            f"{slower[0]:.4g}; the mixture's curvature has a cross term that, divided by the "
            f"unit information, decays like exp(-({slower[0]:.4g} - {decay:g})|phi|), "
            "which is not integrable"
        )
    return None


def _check_existence(components: tuple[Component, ...], model: DataModel) -> None:
    decay = _LIKELIHOODS[model.likelihood].decay
    reasons = [
        f"at the {end} end of {_LIKELIHOODS[model.likelihood].parameter}: {reason}"
        for i, end in enumerate(_ENDS)
        if (reason := _divergence((c.dist.tail_rates()[i] for c in components), decay[i]))
    ]
    if reasons:
        raise NumericalError(
            "the expected_information ESS does not exist (its integral diverges) "
            + "; ".join(reasons)
            + "; use variance_match or curvature_at_mean, or a prior whose components "
            "have lighter tails"
        )


def _log_domain_integrand(
    components: tuple[Component, ...], model: DataModel
) -> Callable[[np.ndarray], np.ndarray]:
    """phi -> p(phi) i_p(phi) / i_F(phi) at an array of points, summed in log form so that
    neither the prior's tails nor the vanishing unit information overflow.

    With l_j = log w_j f_j, L = log p and lambda = log i_F, p i_p = -sum_j e^{l_j} h_j -
    sum_{j<k} e^{l_j + l_k - L} (g_j - g_k)^2 (the responsibility-weighted variance of the
    gradients written pairwise, which keeps the small cross terms of the tails accurate).
    Terms whose log weight has underflowed to -inf count as 0, and so does every point where
    the whole mixture has underflowed.
    """
    from registry.synthesis.mixture import column_logsumexp

    pairs = [(j, k) for j in range(len(components)) for k in range(j + 1, len(components))]
    log_weights = [math.log(c.weight) for c in components]

    def integrand(phi: np.ndarray) -> np.ndarray:
        flat = np.asarray(phi, dtype=float).ravel()
        terms = [c.dist.canonical_terms(flat) for c in components]
        log_w = np.stack([lw + t[0] for lw, t in zip(log_weights, terms, strict=True)])
        g = np.stack([t[1] for t in terms])
        h = np.stack([t[2] for t in terms])
        log_i = model.log_canonical_information(flat)
        live = np.isfinite(log_w)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            log_p = column_logsumexp(log_w)
            own = np.where(
                live & (h != 0.0), -np.sign(h) * np.exp(log_w - log_i + np.log(np.abs(h))), 0.0
            ).sum(axis=0)
            cross = sum(
                np.where(
                    live[j] & live[k] & (g[j] != g[k]),
                    np.exp(log_w[j] + log_w[k] - log_p - log_i + 2.0 * np.log(np.abs(g[j] - g[k]))),
                    0.0,
                )
                for j, k in pairs
            )
        return np.where(live.any(axis=0), own - cross, 0.0).reshape(np.shape(phi))

    return integrand


def _rule(table: str) -> tuple[tuple[float, float, float], ...]:
    """Rows of node, Kronrod weight, Gauss weight (0 off the Gauss nodes)."""
    return tuple(tuple(map(float, row.split())) for row in table.strip().splitlines())


# The Gauss-Kronrod rules of QUADPACK (Piessens, de Doncker-Kapenga, Ueberhuber & Kahaner
# 1983, "QUADPACK", Springer), which scipy's quad applies: the 21-point rule (its 10-point
# Gauss rule on the even-numbered nodes) on a finite piece, the 15-point rule (its 7-point
# Gauss rule on the even-numbered nodes) on a half-line mapped to (0, 1] by
# phi = bound +- (1 - t)/t. Nodes from the outside in, the centre last; each value is the
# double nearest the rule's published 33-digit constant, written to 17 digits.
_KRONROD_21 = _rule(
    """
    0.9956571630258081   0.011694638867371874   0.0
    0.9739065285171717   0.032558162307964725   0.06667134430868814
    0.9301574913557082   0.054755896574351995   0.0
    0.8650633666889845   0.07503967481091996    0.1494513491505806
    0.7808177265864169   0.0931254545836976     0.0
    0.6794095682990244   0.10938715880229764    0.21908636251598204
    0.5627571346686047   0.12349197626206584    0.0
    0.4333953941292472   0.13470921731147334    0.26926671930999635
    0.2943928627014602   0.14277593857706009    0.0
    0.14887433898163122  0.14773910490133849    0.29552422471475287
    0.0                  0.1494455540029169     0.0
    """
)
_KRONROD_15 = _rule(
    """
    0.9914553711208126   0.022935322010529224   0.0
    0.9491079123427585   0.06309209262997856    0.1294849661688697
    0.8648644233597691   0.10479001032225019    0.0
    0.7415311855993945   0.14065325971552592    0.27970539148927664
    0.5860872354676911   0.1690047266392679     0.0
    0.4058451513773972   0.19035057806478542    0.3818300505051189
    0.20778495500789848  0.20443294007529889    0.0
    0.0                  0.20948214108472782    0.4179591836734694
    """
)
_EPSILON = float(np.finfo(float).eps)
_TINY = float(np.finfo(float).tiny)
# where the line is cut: each component's quantiles (where the mixture's curvature changes
# fast), out to 1e-14 of the mass in each tail, so that the half-lines beyond hold almost
# nothing and quad's first rule settles there too
_CUT_LEVELS = (1e-14, 1e-10, 1e-6, 1e-3, 0.1, 0.5, 0.9, 1 - 1e-3, 1 - 1e-6, 1 - 1e-10, 1 - 1e-14)
# quad's tolerances on each piece
_EPSABS, _EPSREL = 1e-11, 1e-10


@dataclass(frozen=True)
class _FirstRule:
    """One Gauss-Kronrod rule on pieces at once: the estimate, QUADPACK's error estimate,
    the integral of |f| and of |f - mean|, each an array over the pieces."""

    value: np.ndarray
    error: np.ndarray
    absolute: np.ndarray
    spread: np.ndarray

    def settled(self) -> np.ndarray:
        """Where QUADPACK's adaptive routine stops after this first rule (dqagse, dqagie:
        the error within max(epsabs, epsrel |value|), or no better than rounding allows, or
        zero), so that quad would return exactly this value."""
        bound = np.maximum(_EPSABS, _EPSREL * np.abs(self.value))
        rounding = (self.error <= 100.0 * _EPSILON * self.absolute) & (self.error > bound)
        return rounding | ((self.error <= bound) & (self.error != self.spread)) | (self.error == 0)


def _kronrod(
    centre: np.ndarray, half: np.ndarray, values: Callable[[np.ndarray], np.ndarray], rule: tuple
) -> _FirstRule:
    """QUADPACK's dqk21 / dqk15i steps, in its order of summation, on every piece at once:
    `values(t)` gives the (transformed) integrand at the nodes t = centre -+ half x."""
    nodes = np.array([x for x, _, _ in rule[:-1]])
    inner = np.asarray(half)[:, None] * nodes
    left = values(centre[:, None] - inner)
    right = values(centre[:, None] + inner)
    mid = values(centre)
    # dqk15i's Gauss rule has the centre and adds every node in turn (a weight 0 off the
    # Gauss nodes); dqk21's has no centre and adds its Gauss nodes before the others
    every = rule[-1][2] != 0.0
    gauss = rule[-1][2] * mid if every else np.zeros_like(mid)
    kronrod = rule[-1][1] * mid
    absolute = np.abs(kronrod)
    last = len(rule) - 1
    order = range(last) if every else [*range(1, last, 2), *range(0, last, 2)]
    for j in order:
        pair = left[:, j] + right[:, j]
        if every or rule[j][2]:
            gauss = gauss + rule[j][2] * pair
        kronrod = kronrod + rule[j][1] * pair
        absolute = absolute + rule[j][1] * (np.abs(left[:, j]) + np.abs(right[:, j]))
    centre_value = kronrod * 0.5
    spread = rule[-1][1] * np.abs(mid - centre_value)
    for j in range(last):
        spread = spread + rule[j][1] * (
            np.abs(left[:, j] - centre_value) + np.abs(right[:, j] - centre_value)
        )
    absolute, spread = absolute * np.abs(half), spread * np.abs(half)
    error = np.abs((kronrod - gauss) * half)
    with np.errstate(divide="ignore", invalid="ignore"):
        scaled = spread * np.minimum(1.0, (200.0 * error / spread) ** 1.5)
    error = np.where((spread != 0) & (error != 0), scaled, error)
    error = np.where(
        absolute > _TINY / (50.0 * _EPSILON), np.maximum(50.0 * _EPSILON * absolute, error), error
    )
    return _FirstRule(kronrod * half, error, absolute, spread)


def _first_rules(
    integrand: Callable[[np.ndarray], np.ndarray], cuts: np.ndarray
) -> tuple[_FirstRule, _FirstRule]:
    """quad's first rule on each finite piece between the increasing `cuts` (21 points) and
    on the half-lines below the first cut and above the last (15 points, in that order)."""
    lo, hi = cuts[:-1], cuts[1:]
    inner = _kronrod(0.5 * (lo + hi), 0.5 * (hi - lo), integrand, _KRONROD_21)
    bounds = cuts[[0, -1]]
    towards = np.array([-1.0, 1.0])  # the lower half-line, then the upper

    def on_unit(t: np.ndarray) -> np.ndarray:
        shape = (-1,) + (1,) * (np.ndim(t) - 1)
        return integrand(bounds.reshape(shape) + towards.reshape(shape) * (1.0 - t) / t) / t / t

    return inner, _kronrod(np.full(2, 0.5), np.full(2, 0.5), on_unit, _KRONROD_15)


def _mixture_expected_information(
    components: tuple[Component, ...], model: DataModel
) -> tuple[float, dict[str, Any]]:
    """int p(phi) i_p(phi) / i_F(phi) dphi by adaptive quadrature on phi (scipy's quad,
    QUADPACK's dqagse and dqagie), the line cut at each component's quantiles
    (`_CUT_LEVELS`) and its two outer pieces integrated to infinity.

    quad starts every piece with one Gauss-Kronrod rule and stops there when that rule's
    error estimate meets its tolerance, as on most pieces of a smooth mixture. That first
    rule is taken here on all pieces at once, with the integrand evaluated on all their
    nodes together, and quad is called only on the pieces where it would go on to divide
    the piece; so the value is quad's, to rounding, at a fraction of its calls."""
    _check_existence(components, model)
    integrand = _log_domain_integrand(components, model)
    cuts = np.array(
        sorted(
            {
                phi
                for c in components
                for q in _CUT_LEVELS
                if math.isfinite(phi := c.dist.canonical_ppf(q))
            }
        )
    )
    inner, outer = _first_rules(integrand, cuts)
    done_inner, done_outer = inner.settled(), outer.settled()
    pieces = [
        ((-math.inf, cuts[0]), outer, done_outer[0], 0),
        *(((a, b), inner, done_inner[i], i) for i, (a, b) in enumerate(itertools.pairwise(cuts))),
        ((cuts[-1], math.inf), outer, done_outer[1], 1),
    ]
    total, err = 0.0, 0.0
    with warnings.catch_warnings():
        # quad's own warnings are replaced by the accuracy check below
        warnings.simplefilter("ignore", integrate.IntegrationWarning)
        for (a, b), rule, settled, i in pieces:
            if settled:
                value, abserr = float(rule.value[i]), float(rule.error[i])
            else:
                value, abserr = integrate.quad(
                    lambda x: float(integrand(np.array([x]))[0]),
                    a,
                    b,
                    limit=500,
                    epsabs=_EPSABS,
                    epsrel=_EPSREL,
                )
            total += value
            err += abserr
    _check_accuracy(total, err)
    return total, {"quadrature_error": err}


def _check_accuracy(total: float, err: float) -> None:
    if not math.isfinite(total) or err > EXPECTED_INFORMATION_RTOL * max(1.0, abs(total)):
        raise NumericalError(
            f"the quadrature for expected_information did not reach its stated accuracy "
            f"(estimate {total:.6g}, error {err:.2g}); use variance_match or a mixture with "
            "fewer, wider components"
        )


def _mixture_subject(prior: Prior) -> _Subject:
    components = prior.components
    means = [c.dist.mean() for c in components]
    variances = [c.dist.var() for c in components]
    missing = ""
    if not all(math.isfinite(m) for m in means):
        missing = "a component has no finite mean (a Student-t with df <= 1?)"
    elif not all(math.isfinite(v) for v in variances):
        missing = "a component has no finite variance (a Student-t with df <= 2?)"
    return _Subject(
        support=prior.support,
        mean=prior.mean() if all(math.isfinite(m) for m in means) else None,
        variance=None if missing else prior.var(),
        missing_moment=missing,
        derivatives=lambda phi: _mixture_derivatives(components, phi),
        expected_information=lambda model: _mixture_expected_information(components, model),
    )


# --- public entry points -----------------------------------------------------------------


def _check_method(method: str) -> None:
    if method not in METHODS:
        raise InputError(
            f"method must be one of {', '.join(METHODS)}, got {method!r}", field="method"
        )


def _run(subject: _Subject, method: str, model: DataModel) -> EssResult:
    value, details = _METHOD_FUNCTIONS[method](subject, model)
    details = {"likelihood": model.likelihood, "unit_sd": model.unit_sd, **details}
    return EssResult(float(value), method, model.unit, details)


def _all(subject: _Subject, model: DataModel) -> dict[str, Any]:
    out: dict[str, Any] = {
        "unit": model.unit,
        "likelihood": model.likelihood,
        "unit_sd": model.unit_sd,
    }
    notes: dict[str, str] = {}
    for method in METHODS:
        try:
            result = _run(subject, method, model)
        except NumericalError as exc:
            out[method] = None
            notes[method] = str(exc)
            continue
        out[method] = result.value
        if "note" in result.details:
            notes[method] = result.details["note"]
    out["notes"] = notes
    return out


def ess(
    prior: Prior,
    *,
    method: str,
    unit_sd: float | None = None,
    likelihood: str | None = None,
    unit: str | None = None,
) -> EssResult:
    """The effective sample size of `prior` by one method (see the module docstring).

    `unit_sd`, `likelihood` and `unit` define one unit of data, as in `data_model`. Raises
    NumericalError, with the reason, where the method's ESS does not exist for this prior
    or cannot be computed to its stated accuracy.
    """
    _check_method(method)
    model = data_model(prior.scale, unit_sd=unit_sd, likelihood=likelihood, unit=unit)
    return _run(_mixture_subject(prior), method, model)


def ess_all(
    prior: Prior,
    unit_sd: float | None = None,
    unit: str | None = None,
    likelihood: str | None = None,
) -> dict[str, Any]:
    """Every method's ESS with the unit: {"unit", "likelihood", "unit_sd",
    "variance_match", "curvature_at_mean", "expected_information", "notes"}.

    A method whose ESS does not exist for this prior, or cannot be computed to its stated
    accuracy, has value None and its reason under "notes"; a method whose value carries a
    caveat has the caveat there too.
    """
    model = data_model(prior.scale, unit_sd=unit_sd, likelihood=likelihood, unit=unit)
    return _all(_mixture_subject(prior), model)


# --- a distribution given by its log density ----------------------------------------------


@dataclass(frozen=True)
class CanonicalDensity:
    """A distribution that need not be a mixture of families, e.g. an exact predictive.

    - `logpdf`: vectorised log density of phi = to_canonical(support, x) (with the Jacobian
      of that change of variable); it may lack its normalising constant;
    - `lower`, `upper`: the range of phi outside which the density is taken as zero;
      the methods refuse a range at whose ends the density or the information integrand has
      not yet decayed;
    - `mean`, `variance`: on the prior's own scale x, None where they do not exist;
    - `derivatives`: d/dphi log p and -d2/dphi2 log p; by default five-point central
      differences of `logpdf` (Abramowitz & Stegun 1964, 25.3.6 and 25.3.24, recalled), with
      a step of 1e-3 of the range.
    """

    logpdf: Callable[[np.ndarray], np.ndarray]
    support: str
    lower: float
    upper: float
    mean: float | None
    variance: float | None
    derivatives: Derivatives | None = None

    def __post_init__(self) -> None:
        if self.support not in _COORDINATES:
            raise InputError(
                f"support must be one of {', '.join(_COORDINATES)}, got {self.support!r}",
                field="support",
            )
        if not (
            math.isfinite(self.lower) and math.isfinite(self.upper) and self.lower < self.upper
        ):
            raise InputError(
                f"the range of phi must be finite with lower < upper, got "
                f"[{self.lower}, {self.upper}]",
                field="range",
            )

    @classmethod
    def from_grid(
        cls,
        phi: Any,
        logpdf: Any,
        *,
        support: str,
        mean: float | None,
        variance: float | None,
    ) -> CanonicalDensity:
        """From log density values on an increasing grid of phi, through a cubic spline
        whose first and second derivatives give the gradient and curvature."""
        phi, logpdf = np.asarray(phi, dtype=float), np.asarray(logpdf, dtype=float)
        if phi.ndim != 1 or phi.shape != logpdf.shape or len(phi) < 5:
            raise InputError("the grid needs at least 5 points, one value per point", field="grid")
        if not (np.all(np.diff(phi) > 0) and np.all(np.isfinite(logpdf))):
            raise InputError("the grid must increase and the log density be finite", field="grid")
        spline = interpolate.CubicSpline(phi, logpdf)
        return cls(
            spline,
            support,
            float(phi[0]),
            float(phi[-1]),
            mean,
            variance,
            lambda t: (spline(t, 1), -spline(t, 2)),
        )

    def gradient_and_curvature(self, phi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if self.derivatives is not None:
            return self.derivatives(phi)
        h = 1e-3 * (self.upper - self.lower)
        f = [self.logpdf(phi + k * h) for k in (-2, -1, 0, 1, 2)]
        grad = (f[0] - 8.0 * f[1] + 8.0 * f[3] - f[4]) / (12.0 * h)
        second = (-f[0] + 16.0 * f[1] - 30.0 * f[2] + 16.0 * f[3] - f[4]) / (12.0 * h * h)
        return grad, -second


def _tail_remainder(values: np.ndarray, step: float) -> float:
    """What lies beyond the last point of `values` (ordered towards the end), extrapolating
    |values| exponentially over the last 1% of the points (a baseline long enough to pass
    over a spline's end effects); inf where it does not decay. Values below 1e-12 of the
    largest count as zero."""
    baseline = max(len(values) // 100, 1)
    last, before = abs(float(values[-1])), abs(float(values[-1 - baseline]))
    if last <= 1e-12 * float(np.max(np.abs(values))):
        return 0.0
    if before <= last:
        return math.inf
    return last * baseline * step / math.log(before / last)


def _density_expected_information(
    density: CanonicalDensity, model: DataModel, points: int = 8001
) -> tuple[float, dict[str, Any]]:
    """E[i_p / i_F] by Simpson's rule on [lower, upper], with the error estimated from the
    same rule on every other point, and the parts beyond the range extrapolated."""
    phi = np.linspace(density.lower, density.upper, points)
    log_p = density.logpdf(phi)
    p = np.exp(log_p - np.max(log_p))
    integrand = p * density.gradient_and_curvature(phi)[1] / model.canonical_information(phi)
    step = phi[1] - phi[0]
    mass = integrate.simpson(p, dx=step)
    fine = integrate.simpson(integrand, dx=step) / mass
    coarse = integrate.simpson(integrand[::2], dx=2 * step) / integrate.simpson(p[::2], dx=2 * step)
    for end, order in zip(_ENDS, (slice(None, None, -1), slice(None)), strict=True):
        beyond = (
            max(
                _tail_remainder(p[order], step),
                _tail_remainder(integrand[order], step) / max(abs(fine), 1.0),
            )
            / mass
        )
        if beyond > EXPECTED_INFORMATION_RTOL:
            raise NumericalError(
                f"the density or the information integrand has not decayed at the {end} "
                f"end of the range of phi ({density.lower:g}, {density.upper:g}): widen the "
                "range; if it still does not decay, the expected_information ESS does not exist"
            )
    _check_accuracy(fine, abs(fine - coarse))
    return fine, {"quadrature_error": abs(fine - coarse)}


def ess_of_density(
    density: CanonicalDensity,
    scale: str,
    *,
    unit_sd: float | None = None,
    unit: str | None = None,
    likelihood: str | None = None,
) -> dict[str, Any]:
    """Every method's ESS of a distribution given by its log density (`CanonicalDensity`)
    on `scale`, with the data model as in `data_model`; the same keys as `ess_all`."""
    if SUPPORT.get(scale) != density.support:
        raise InputError(
            f"a prior on the {scale} scale needs a {SUPPORT.get(scale)}-valued density, "
            f"got support {density.support}",
            field="support",
        )
    model = data_model(scale, unit_sd=unit_sd, likelihood=likelihood, unit=unit)
    moments = "mean" if density.mean is None else "variance"
    subject = _Subject(
        support=density.support,
        mean=density.mean,
        variance=density.variance,
        missing_moment=f"the density has no finite {moments}",
        derivatives=density.gradient_and_curvature,
        expected_information=lambda m: _density_expected_information(density, m),
    )
    return _all(subject, model)


# --- the cap and the shares ----------------------------------------------------------------


def solve_power_for_cap(
    ess_of_power: Callable[[float], float | None],
    cap: float,
    *,
    tol: float = 0.005,
    method: str = "chosen",
    known: Iterable[float] = (),
) -> float:
    """The global power weight a in (0, 1] whose prior has ESS equal to `cap`.

    `ess_of_power(a)` is the ESS by `method` at power weight a, or None where that ESS does
    not exist; a cap is only solved against an ESS that exists at every weight tried. ESS is
    taken to increase with a (a power weight scales information). Returns 1.0 when
    ESS(1) <= cap; otherwise brackets the root, by the closest of the weights `known` (whose
    ESS the caller has at hand) on each side where one of them lies below the cap, else by
    decades down to 1e-10, solves ESS(a) = cap by Brent's method and checks that the ESS at
    the answer is within `tol` (relative) of the cap.
    """
    if not (math.isfinite(cap) and cap > 0):
        raise InputError(f"an ESS cap must be finite and positive, got {cap}", field="cap")
    if not 0 < tol < 0.01:
        raise InputError(f"the tolerance must be in (0, 0.01), got {tol}", field="tol")

    def value(a: float) -> float:
        v = ess_of_power(a)
        if v is None or not math.isfinite(v):
            raise NumericalError(
                f"the {method} ESS does not exist for the prior at global power weight "
                f"{a:.6g}, so the cap {cap:g} cannot be solved against it; set the cap on an "
                "ESS method that exists for this prior, or change the prior's family or "
                "components"
            )
        return v

    if value(1.0) <= cap:
        return 1.0
    below = [w for w in known if 0 < w < 1 and value(w) <= cap]
    if below:
        low = max(below)
        high = min(w for w in (*known, 1.0) if w > low and value(w) > cap)
    else:
        # bracket by decades, so that extreme weights are only tried when needed
        high = 1.0
        for low in (10.0**-k for k in range(1, 11)):
            if value(low) <= cap:
                break
            high = low
        else:
            raise NumericalError(
                f"even a global power weight of {low:g} leaves the ESS above "
                f"the cap {cap:g}; check the cap and its unit"
            )
    a = float(
        optimize.brentq(
            lambda w: value(w) / cap - 1.0, low, high, xtol=1e-14, rtol=1e-12, maxiter=200
        )
    )
    reached = value(a)
    if abs(reached / cap - 1.0) > tol:
        raise NumericalError(
            f"the ESS at power weight {a:.6g} is {reached:.6g}, not within "
            f"{tol:.1%} of the cap {cap:g}; the ESS may not rise smoothly "
            "with the weight: try another ESS method"
        )
    return a


def power_for_ess_cap(
    ess_all_of_power: Callable[[float], Mapping[str, Any]],
    cap: float,
    *,
    method: str,
    tol: float = 0.005,
) -> float:
    """`solve_power_for_cap` on one method of `ess_all`'s result at each power weight; where
    that method's ESS does not exist, the error gives `ess_all`'s reason."""
    _check_method(method)

    def value(a: float) -> float | None:
        values = ess_all_of_power(a)
        if values[method] is None:
            raise NumericalError(
                f"the cap is set on the {method} ESS, which does not exist at global power "
                f"weight {a:.6g} ({values['notes'][method]}); set the cap on another method "
                f"(one of {', '.join(METHODS)})"
            )
        return values[method]

    return solve_power_for_cap(value, cap, tol=tol, method=method)


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
