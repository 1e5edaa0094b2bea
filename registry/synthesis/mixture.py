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
Newton's method on the digamma equations (gamma) or L-BFGS-B on log a, log b (beta). The
Jacobian of the change of scale is common to all components, so it leaves EM unchanged.

Number of components: BIC = -2 n sum_g w_g log q(x_g) + p log n with the effective sample size
n = `sample_size` (default 1000: the density is exact, so n is a stated choice, read as "as
if the predictive were known from 1000 draws"). The smallest BIC is taken unless its
quantile error exceeds `QUANTILE_ERROR_BOUND`; then the fewest components that meet the bound
(or, if none does, the one with the smallest error) are taken.

Error: the largest absolute difference between the mixture's and the grid density's
quantiles at `ERROR_LEVELS`, on the analysis scale, in absolute terms and relative to the grid
density's sd, and KL(f || q) on the grid.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import optimize, special, stats

from registry.errors import InputError, NumericalError
from registry.priors.value import Component

# The bound the selection enforces: quantile error relative to the target's sd.
QUANTILE_ERROR_BOUND = 0.05
ERROR_LEVELS = (0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9, 0.95, 0.975, 0.99, 0.995)
FAMILIES = ("normal", "beta", "gamma")

_EM_TOL = 1e-9
_EM_STEPS = 1000


@dataclass(frozen=True)
class MixtureFit:
    """The chosen mixture, its error, and the criterion for each number of components."""

    components: tuple[Component, ...]
    n_components: int
    error: Mapping[str, float]
    criterion: Mapping[int, float]
    criterion_name: str

    def to_dict(self) -> dict[str, Any]:
        return {
            "components": [c.to_dict() for c in self.components],
            "n_components": self.n_components,
            "error": dict(self.error),
            "criterion": {str(j): v for j, v in self.criterion.items()},
            "criterion_name": self.criterion_name,
        }


def _natural(family: str, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Points on the component family's scale and log |d natural / d x|."""
    if family == "normal":
        return x, np.zeros_like(x)
    if family == "beta":
        p = special.expit(x)
        return p, np.log(p) + np.log1p(-p)
    r = np.exp(x)
    return r, x


def _logpdf(family: str, params: np.ndarray, t: np.ndarray) -> np.ndarray:
    """(J, G) log densities of the J components at natural-scale points t."""
    a, b = params[:, :1], params[:, 1:]
    if family == "normal":
        return stats.norm.logpdf(t, a, b)
    if family == "beta":
        return stats.beta.logpdf(t, a, b)
    return stats.gamma.logpdf(t, a, scale=b)


def _m_step(family: str, t: np.ndarray, r: np.ndarray, old: np.ndarray) -> np.ndarray:
    """Weighted maximum likelihood for each component (rows of r are its weights)."""
    mass = r.sum(axis=1)
    out = np.empty_like(old)
    for j in range(r.shape[0]):
        w = r[j] / mass[j]
        if family == "normal":
            m = w @ t
            out[j] = m, max(math.sqrt(w @ (t - m) ** 2), 1e-12)
        elif family == "gamma":
            mean, mean_log = w @ t, w @ np.log(t)
            # shape a solves log a - digamma(a) = log mean - mean log (Newton on log a)
            s = max(math.log(mean) - mean_log, 1e-12)
            a = (3 - s + math.sqrt((s - 3) ** 2 + 24 * s)) / (12 * s)
            for _ in range(50):
                g = math.log(a) - special.digamma(a) - s
                a_new = a * math.exp(-g / (1 - a * special.polygamma(1, a)))
                if abs(a_new - a) < 1e-12 * a:
                    a = a_new
                    break
                a = a_new
            out[j] = a, mean / a
        else:
            out[j] = _beta_mle(w @ np.log(t), w @ np.log1p(-t), old[j])
    return out


def _beta_mle(s1: float, s2: float, start: np.ndarray) -> np.ndarray:
    """Solve psi(a) - psi(a + b) = s1, psi(b) - psi(a + b) = s2 by damped Newton steps."""
    ab = np.array(start, dtype=float)
    for _ in range(100):
        a, b = ab
        total = special.digamma(a + b)
        g = np.array([special.digamma(a) - total - s1, special.digamma(b) - total - s2])
        tri = special.polygamma(1, a + b)
        jac = np.array(
            [[special.polygamma(1, a) - tri, -tri], [-tri, special.polygamma(1, b) - tri]]
        )
        step = np.linalg.solve(jac, g)
        scale = 1.0
        while np.any(ab - scale * step <= 0):
            scale /= 2
        ab = ab - scale * step
        if np.max(np.abs(scale * step) / ab) < 1e-12:
            break
    return ab


def _initial(family: str, t: np.ndarray, w: np.ndarray, j: int) -> np.ndarray:
    """Components placed at the (i + 1/2)/J quantiles of the target, each a J-th as wide."""
    cdf = np.cumsum(w)
    centres = np.interp((np.arange(j) + 0.5) / j, cdf, t)
    mean = w @ t
    sd = math.sqrt(w @ (t - mean) ** 2) / j
    if family == "normal":
        return np.column_stack([centres, np.full(j, sd)])
    if family == "gamma":
        shape = (centres / sd) ** 2
        return np.column_stack([shape, centres / shape])
    size = np.maximum(centres * (1 - centres) / sd**2 - 1, 2.0)
    return np.column_stack([centres * size, (1 - centres) * size])


def _em(family: str, t: np.ndarray, w: np.ndarray, j: int) -> tuple[np.ndarray, np.ndarray, float]:
    params = _initial(family, t, w, j)
    log_pi = np.full(j, -math.log(j))
    last = -np.inf
    for _ in range(_EM_STEPS):
        joint = log_pi[:, None] + _logpdf(family, params, t)
        total = special.logsumexp(joint, axis=0)
        loglik = float(w @ total)
        r = np.exp(joint - total) * w
        log_pi = np.log(np.maximum(r.sum(axis=1), 1e-300))
        params = _m_step(family, t, r, params)
        if abs(loglik - last) < _EM_TOL:
            break
        last = loglik
    joint = log_pi[:, None] + _logpdf(family, params, t)
    return np.exp(log_pi), params, float(w @ special.logsumexp(joint, axis=0))


def _grid_quantiles(x: np.ndarray, density: np.ndarray, levels: np.ndarray) -> np.ndarray:
    cdf = np.concatenate([[0.0], np.cumsum(0.5 * (density[1:] + density[:-1]) * np.diff(x))])
    return np.interp(levels, cdf / cdf[-1], x)


def _mixture_quantiles(
    components: tuple[Component, ...], family: str, levels: np.ndarray
) -> np.ndarray:
    """Mixture quantiles on the analysis scale (by root finding on the natural scale)."""
    frozen = [(c.weight, c.dist.frozen()) for c in components]
    out = []
    for q in levels:
        lo = min(f.ppf(q) for _, f in frozen)
        hi = max(f.ppf(q) for _, f in frozen)
        value = (
            lo
            if lo == hi
            else optimize.brentq(
                lambda v, q=q: sum(wt * f.cdf(v) for wt, f in frozen) - q,
                lo,
                hi,
                xtol=1e-14,
                rtol=1e-12,
            )
        )
        out.append(value)
    t = np.asarray(out)
    if family == "beta":
        return special.logit(t)
    return np.log(t) if family == "gamma" else t


def fit_mixture(
    x: Any,
    density: Any,
    family: str = "normal",
    *,
    max_components: int = 4,
    criterion: str = "bic",
    sample_size: float = 1000.0,
) -> MixtureFit:
    """Fit a mixture of `family` components to a density tabulated on the analysis scale.

    x must be increasing and evenly or unevenly spaced; density >= 0 on it (any scale factor).
    For "beta", x is on the logit scale; for "gamma", on the log scale (see module docstring).
    """
    x = np.asarray(x, dtype=float).ravel()
    f = np.asarray(density, dtype=float).ravel()
    if family not in FAMILIES:
        raise InputError(
            f"unknown mixture family {family!r}; one of {', '.join(FAMILIES)}", field="family"
        )
    if criterion not in ("bic", "aic"):
        raise InputError("criterion must be bic or aic", field="criterion")
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
    dx = np.gradient(x)
    w = f * dx
    w = w / w.sum()
    t, log_jac = _natural(family, x)
    levels = np.asarray(ERROR_LEVELS)
    target_q = _grid_quantiles(x, f, levels)
    mean = w @ x
    sd = math.sqrt(w @ (x - mean) ** 2)
    penalty = math.log(sample_size) if criterion == "bic" else 2.0
    fits = {}
    for j in range(1, max_components + 1):
        pi, params, loglik = _em(family, t, w, j)
        if not np.all(np.isfinite(params)) or np.any(params[:, 1] <= 0):
            raise NumericalError(
                f"EM for {j} {family} components failed; try fewer components or a finer grid"
            )
        names = {"normal": ("loc", "scale"), "beta": ("a", "b"), "gamma": ("a", "scale")}[family]
        comps = tuple(
            Component(family, dict(zip(names, map(float, p), strict=True)), float(wt))
            for wt, p in zip(pi / pi.sum(), params, strict=True)
        )
        q_err = float(np.max(np.abs(_mixture_quantiles(comps, family, levels) - target_q)))
        joint = np.log(pi)[:, None] + _logpdf(family, params, t)
        log_q = special.logsumexp(joint, axis=0) + log_jac
        positive = f > 0
        log_f = np.log(f[positive] / (f * dx).sum())
        kl = float(w[positive] @ (log_f - log_q[positive]))
        n_params = 3 * j - 1
        fits[j] = (comps, -2 * sample_size * loglik + penalty * n_params, q_err, kl)
    scores = {j: v[1] for j, v in fits.items()}
    best = min(scores, key=scores.__getitem__)
    bound = QUANTILE_ERROR_BOUND * sd
    if fits[best][2] > bound:
        meeting = [j for j in fits if fits[j][2] <= bound]
        best = min(meeting) if meeting else min(fits, key=lambda j: fits[j][2])
    comps, _, q_err, kl = fits[best]
    return MixtureFit(
        components=comps,
        n_components=best,
        error={"quantile": q_err, "quantile_relative": q_err / sd, "kl": kl},
        criterion=scores,
        criterion_name=criterion,
    )
