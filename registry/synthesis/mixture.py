"""A finite mixture fitted to a density given on a grid (the predictive of `bayes`).

The grid (x_g, f_g) on the analysis scale becomes a weighted sample with masses
w_g = f_g dx_g / sum (trapezoid rule). EM (Dempster, Laird & Rubin 1977, JRSS B 39:1) for the
weighted sample maximises sum_g w_g log q(x_g), i.e. minimises KL(f || q) up to grid error:
    E-step  r_gj = pi_j q_j(x_g) / q(x_g)           (in log space)
    M-step  pi_j = sum_g w_g r_gj, and each component's weighted maximum likelihood fit.
Families and their M-steps:
- "normal" on the analysis scale: closed-form weighted mean and variance;
- "beta" on the probability scale, for a grid given on the logit scale (p = expit(x));
- "gamma" on the rate scale, for a grid given on the log scale (r = exp(x)).
For beta and gamma the M-step is the exact weighted maximum likelihood, found numerically
from the weighted sufficient statistics (mean log p and log(1 - p); mean r and log r), by
Newton's method on the digamma equations (gamma) or damped Newton steps on them (beta). The
trigamma function there is the Hurwitz zeta function zeta(2, a) (what scipy's
polygamma(1, a) evaluates, without its array wrapping). The Jacobian of the change of scale
is common to all components, so it leaves EM unchanged.

Number of components: counts from 1 to `max_components` are fitted in turn; the fit taken is
the one with the FEWEST components that meets every bound (a single family when one is close
enough), else the one with the smallest quantile error, marked as missing its bound. The
bounds: the largest quantile error at `ERROR_LEVELS` (0.5% to 99.5%) at most
`QUANTILE_ERROR_BOUND` of the target's sd, and the variance within `VARIANCE_BOUND`
(relative) of the target's, so that tails and the information carried are kept; a caller may
add its own test (the effective sample size of each method, for instance). BIC = -2 n sum_g
w_g log q(x_g) + p log n with n = `sample_size` (default 1000, a stated choice: the density is
exact) is reported for each count tried.

Error: the largest absolute difference between the mixture's and the grid density's
quantiles at `ERROR_LEVELS`, on the analysis scale, in absolute terms and relative to the grid
density's sd; the ratio of the mixture's variance to the grid density's, both on the grid; and
KL(f || q) on the grid.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, special

from registry.errors import InputError, NumericalError
from registry.values.families import from_canonical
from registry.values.prior import Component

# The bounds a fit must meet: quantile error relative to the target's sd, and the relative
# difference of the variances.
QUANTILE_ERROR_BOUND = 0.05
VARIANCE_BOUND = 0.05
ERROR_LEVELS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975, 0.99, 0.995)

_EM_TOL = 1e-9
_EM_STEPS = 1000


@dataclass(frozen=True)
class Candidate:
    """The mixture of one number of components, and how far it is from the target."""

    components: tuple[Component, ...]
    bic: float
    quantile_error: float
    quantile_relative: float
    variance_ratio: float
    kl: float

    @property
    def n_components(self) -> int:
        return len(self.components)

    def within_bounds(self) -> bool:
        return (
            self.quantile_relative <= QUANTILE_ERROR_BOUND
            and abs(self.variance_ratio - 1.0) <= VARIANCE_BOUND
        )

    def error(self) -> dict[str, float]:
        return {
            "quantile": self.quantile_error,
            "quantile_relative": self.quantile_relative,
            "variance_ratio": self.variance_ratio,
            "kl": self.kl,
        }


@dataclass(frozen=True)
class MixtureFit:
    """The chosen mixture, whether it meets the bounds, and every candidate tried."""

    chosen: Candidate
    meets_bounds: bool
    candidates: tuple[Candidate, ...]

    @property
    def components(self) -> tuple[Component, ...]:
        return self.chosen.components

    @property
    def n_components(self) -> int:
        return self.chosen.n_components

    @property
    def error(self) -> dict[str, float]:
        return self.chosen.error()

    def to_dict(self) -> dict[str, Any]:
        return {
            "components": [c.to_dict() for c in self.components],
            "n_components": self.n_components,
            "meets_bounds": self.meets_bounds,
            "error": self.error,
            "bic": {str(c.n_components): c.bic for c in self.candidates},
        }


def _normal_m_step(t: np.ndarray, w: np.ndarray, _old: np.ndarray) -> np.ndarray:
    m = w @ t
    return np.array([m, max(math.sqrt(w @ (t - m) ** 2), 1e-12)])


def _gamma_m_step(t: np.ndarray, w: np.ndarray, _old: np.ndarray) -> np.ndarray:
    """Shape a solves log a - digamma(a) = log mean - mean log (Newton on log a, from the
    closed-form start of Minka 2002, recalled); scale = mean / a."""
    mean, mean_log = w @ t, w @ np.log(t)
    s = max(math.log(mean) - mean_log, 1e-12)
    a = (3 - s + math.sqrt((s - 3) ** 2 + 24 * s)) / (12 * s)
    for _ in range(50):
        g = math.log(a) - special.digamma(a) - s
        a_new = a * math.exp(-g / (1 - a * special.zeta(2, a)))
        if abs(a_new - a) < 1e-12 * a:
            return np.array([a_new, mean / a_new])
        a = a_new
    return np.array([a, mean / a])


def _beta_m_step(t: np.ndarray, w: np.ndarray, old: np.ndarray) -> np.ndarray:
    """Solve psi(a) - psi(a + b) = mean log p, psi(b) - psi(a + b) = mean log(1 - p) by
    damped Newton steps."""
    s1, s2 = w @ np.log(t), w @ np.log1p(-t)
    ab = np.array(old, dtype=float)
    for _ in range(100):
        a, b = ab
        total = special.digamma(a + b)
        g = np.array([special.digamma(a) - total - s1, special.digamma(b) - total - s2])
        tri = special.zeta(2, a + b)
        jac = np.array([[special.zeta(2, a) - tri, -tri], [-tri, special.zeta(2, b) - tri]])
        step = np.linalg.solve(jac, g)
        scale = 1.0
        while np.any(ab - scale * step <= 0):
            scale /= 2
        ab = ab - scale * step
        if np.max(np.abs(scale * step) / ab) < 1e-12:
            break
    return ab


def _normal_start(centres: np.ndarray, sd: float) -> np.ndarray:
    return np.column_stack([centres, np.full(centres.size, sd)])


def _gamma_start(centres: np.ndarray, sd: float) -> np.ndarray:
    shape = (centres / sd) ** 2
    return np.column_stack([shape, centres / shape])


def _beta_start(centres: np.ndarray, sd: float) -> np.ndarray:
    size = np.maximum(centres * (1 - centres) / sd**2 - 1, 2.0)
    return np.column_stack([centres * size, (1 - centres) * size])


@dataclass(frozen=True)
class _Fitter:
    """How EM fits one family: its weighted maximum-likelihood M-step and its start."""

    m_step: Callable[[np.ndarray, np.ndarray, np.ndarray], np.ndarray]
    start: Callable[[np.ndarray, float], np.ndarray]


# Families EM can fit; each lives on its own support, reached from the analysis scale by the
# canonical transform (identity, expit for beta on logit, exp for gamma on log).
FITTERS: dict[str, _Fitter] = {
    "normal": _Fitter(_normal_m_step, _normal_start),
    "beta": _Fitter(_beta_m_step, _beta_start),
    "gamma": _Fitter(_gamma_m_step, _gamma_start),
}
FAMILIES = tuple(FITTERS)

# log |d natural / d x| of the canonical transform, per support, at x and t = natural(x)
_LOG_JACOBIAN: dict[str, Callable[[np.ndarray, np.ndarray], np.ndarray]] = {
    "real": lambda x, _t: np.zeros_like(x),
    "positive": lambda x, _t: x,
    "unit": lambda _x, t: np.log(t) + np.log1p(-t),
}


def _components(family: str, pi: np.ndarray, params: np.ndarray) -> tuple[Component, ...]:
    from registry.values.families import family as family_class

    names = family_class(family).parameter_names()
    return tuple(
        Component(family, dict(zip(names, map(float, p), strict=True)), float(wt))
        for wt, p in zip(pi / pi.sum(), params, strict=True)
    )


def _logpdf(family: str, params: np.ndarray, t: np.ndarray) -> np.ndarray:
    """(J, G) log densities of the J components at natural-scale points t."""
    from registry.values.families import family as family_class

    return family_class(family).log_densities(params, t)


def column_logsumexp(joint: np.ndarray) -> np.ndarray:
    """`scipy.special.logsumexp(joint, axis=0)` by SciPy's own steps (the largest terms of
    each column counted apart: log1p of the rest over their count, plus the log of the
    count, plus the largest; log of the plain sum where that is not finite), so the sums
    are the same to the bit, without the general function's checks, which cost as much as
    EM's own arithmetic."""
    top = joint.max(axis=0)
    largest = joint == top
    count = largest.sum(axis=0, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        # SciPy keeps a zero sum apart from the division; 0 / count is that same zero
        rest = np.exp(np.where(largest, -np.inf, joint) - top).sum(axis=0) / count
        out = np.log1p(rest) + np.log(count) + top
        finite = np.isfinite(out)
        if finite.all():
            return out
        return np.where(finite, out, np.log(np.exp(joint).sum(axis=0)))


def _em(family: str, t: np.ndarray, w: np.ndarray, j: int) -> tuple[np.ndarray, np.ndarray, float]:
    fitter = FITTERS[family]
    cdf = np.cumsum(w)
    centres = np.interp((np.arange(j) + 0.5) / j, cdf, t)
    mean = w @ t
    params = fitter.start(centres, math.sqrt(w @ (t - mean) ** 2) / j)
    log_pi = np.full(j, -math.log(j))
    last = -np.inf
    for _ in range(_EM_STEPS):
        joint = log_pi[:, None] + _logpdf(family, params, t)
        total = column_logsumexp(joint)
        loglik = float(w @ total)
        r = np.exp(joint - total) * w
        mass = r.sum(axis=1)
        log_pi = np.log(np.maximum(mass, 1e-300))
        params = np.array([fitter.m_step(t, r[i] / mass[i], params[i]) for i in range(j)])
        if abs(loglik - last) < _EM_TOL:
            break
        last = loglik
    joint = log_pi[:, None] + _logpdf(family, params, t)
    return np.exp(log_pi), params, float(w @ column_logsumexp(joint))


def _grid_quantiles(x: np.ndarray, density: np.ndarray, levels: np.ndarray) -> np.ndarray:
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (density[1:] + density[:-1]) * np.diff(x))])
    return np.interp(levels, cdf / cdf[-1], x)


def _mixture_quantiles(components: tuple[Component, ...], levels: np.ndarray) -> np.ndarray:
    """Mixture quantiles on the analysis scale (by root finding on the natural scale).

    The components share one family, so their distribution functions are evaluated together
    (`Family.cdfs`); the sum over them is taken in order, as one component at a time."""
    family = type(components[0].dist)
    names = family.parameter_names()
    params = np.array([[c.params[n] for n in names] for c in components])
    weights = [c.weight for c in components]
    dists = [c.dist for c in components]

    def cdf(v: float) -> float:
        return sum(wt * f for wt, f in zip(weights, family.cdfs(params, v)[:, 0], strict=True))

    # each level's root lies between the components' own quantiles there
    own = np.array([d.ppf(levels) for d in dists], dtype=float)
    out = []
    for q, lo, hi in zip(levels, own.min(axis=0), own.max(axis=0), strict=True):
        value = (
            lo
            if lo == hi
            else optimize.brentq(
                lambda v, q=q: cdf(v) - q,
                lo,
                hi,
                xtol=1e-14,
                rtol=1e-12,
            )
        )
        out.append(value)
    from registry.values.families import to_canonical

    return np.asarray(to_canonical(components[0].support, np.asarray(out)))


def fit_mixture(
    x: Any,
    density: Any,
    family: str = "normal",
    *,
    max_components: int = 4,
    sample_size: float = 1000.0,
    accept: Callable[[Candidate], bool] | None = None,
) -> MixtureFit:
    """Fit mixtures of `family` components to a density tabulated on the analysis scale.

    x must be increasing (evenly or unevenly spaced); density >= 0 on it (any scale factor).
    For "beta", x is on the logit scale; for "gamma", on the log scale (see module docstring).
    `accept` adds a test a candidate must pass besides the module's bounds.
    """
    x = np.asarray(x, dtype=float).ravel()
    f = np.asarray(density, dtype=float).ravel()
    if family not in FITTERS:
        raise InputError(
            f"unknown mixture family {family!r}; one of {', '.join(FAMILIES)}", field="family"
        )
    if (
        x.size < 10
        or x.size != f.size
        or np.any(np.diff(x) <= 0)
        or np.any(f < 0)
        or not (np.all(np.isfinite(x)) and np.all(np.isfinite(f)))
        or f.sum() <= 0
    ):
        raise InputError(
            "need at least 10 increasing grid points with a finite density >= 0", field="density"
        )
    if not 1 <= max_components <= 10:
        raise InputError("max_components must be between 1 and 10", field="max_components")
    if sample_size <= 1:
        raise InputError("sample_size must be > 1", field="sample_size")
    from registry.values.families import family as family_class

    support = family_class(family).support
    dx = np.gradient(x)
    w = f * dx
    w = w / w.sum()
    t = np.asarray(from_canonical(support, x))
    # log |d natural / d x| (the Jacobian of the canonical transform)
    log_jac = _LOG_JACOBIAN[support](x, t)
    levels = np.asarray(ERROR_LEVELS)
    target_q = _grid_quantiles(x, f, levels)
    mean = w @ x
    var = float(w @ (x - mean) ** 2)
    sd = math.sqrt(var)
    candidates = []
    for j in range(1, max_components + 1):
        pi, params, loglik = _em(family, t, w, j)
        if not np.all(np.isfinite(params)) or np.any(params[:, 1] <= 0):
            raise NumericalError(
                f"EM for {j} {family} components failed; try fewer components or a finer grid"
            )
        comps = _components(family, pi, params)
        q_err = float(np.max(np.abs(_mixture_quantiles(comps, levels) - target_q)))
        log_q = column_logsumexp(np.log(pi)[:, None] + _logpdf(family, params, t))
        log_q = log_q + log_jac
        q_grid = np.exp(log_q) * dx
        q_grid = q_grid / q_grid.sum()
        mix_mean = q_grid @ x
        positive = f > 0
        log_f = np.log(f[positive] / (f * dx).sum())
        candidate = Candidate(
            components=comps,
            bic=-2 * sample_size * loglik + math.log(sample_size) * (3 * j - 1),
            quantile_error=q_err,
            quantile_relative=q_err / sd,
            variance_ratio=float(q_grid @ (x - mix_mean) ** 2) / var,
            kl=float(w[positive] @ (log_f - log_q[positive])),
        )
        candidates.append(candidate)
        if candidate.within_bounds() and (accept is None or accept(candidate)):
            return MixtureFit(candidate, True, tuple(candidates))
    best = min(candidates, key=lambda c: c.quantile_relative)
    return MixtureFit(best, False, tuple(candidates))
