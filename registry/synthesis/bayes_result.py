"""The Bayesian pooled result: posterior summaries, the predictive, and their assembly.

The predictive of a new study's parameter, theta_new | mu, tau ~ N(mu, tau²) integrated over
the posterior, is the meta-analytic-predictive prior of Neuenschwander, Capkun-Niggli,
Branson & Spiegelhalter (2010, Clinical Trials 7:5).

Accuracy: `QUANTILE_ACCURACY` is the stated bound on the error of the predictive quantiles
(levels 0.005 to 0.995), in units of max(1, predictive sd) on the analysis scale;
`TAU_ACCURACY` the bound on the error of the tau median and of the ends of its credible
interval, in units of max(1, upper end). The result carries both as absolute figures. Both
are checked by refinement (`refine` > 1 narrows every spacing, raises the Gauss-Hermite order
and widens the cut) in `tests/test_bayes.py`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from registry.synthesis.heterogeneity import heterogeneity
from registry.synthesis.hyperpriors import MuPrior, TauPrior
from registry.synthesis.kernels import KernelSum

QUANTILE_ACCURACY = 1e-5
TAU_ACCURACY = 1e-4
QUANTILE_LEVELS = (0.005, 0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975, 0.995)
CREDIBLE_LEVEL = 0.95
_GRID_POINTS = 401


def _key(level: float) -> str:
    return f"{level:g}"


@dataclass(frozen=True)
class Predictive:
    """The predictive distribution of a new study's parameter on the analysis scale.

    `x`, `density` are the density on a grid spanning the 1e-4 and 1 - 1e-4 quantiles (and a
    tenth of that span beyond); `cdf`, `pdf`, `ppf` evaluate it anywhere.
    """

    mean: float
    sd: float
    quantiles: Mapping[str, float]
    x: np.ndarray = field(repr=False, compare=False)
    density: np.ndarray = field(repr=False, compare=False)
    _dist: KernelSum = field(repr=False, compare=False)

    def cdf(self, x: Any) -> np.ndarray:
        return self._dist.cdf(x)

    def pdf(self, x: Any) -> np.ndarray:
        return self._dist.pdf(x)

    def ppf(self, levels: Sequence[float]) -> np.ndarray:
        return self._dist.ppf(levels)

    def to_dict(self, include_grid: bool = False) -> dict[str, Any]:
        out: dict[str, Any] = {"mean": self.mean, "sd": self.sd, "quantiles": dict(self.quantiles)}
        if include_grid:
            out["x"] = [float(v) for v in self.x]
            out["density"] = [float(v) for v in self.density]
        return out


@dataclass(frozen=True)
class BayesResult:
    """A Bayesian pooled result. Intervals are central 95% credible intervals.

    mu, se: posterior mean and sd of mu; tau: posterior median of tau; tau2: posterior mean
    of tau²; prediction: the predictive's 2.5% and 97.5% quantiles. i2 and q are the classical
    statistics of `heterogeneity` on the normal-approximation y, se (for counts, logit or log
    of (events + 0.5)/(total or exposure ...) with the 0.5 correction; common practice).
    accuracy: the absolute bound on the predictive quantiles' integration error;
    tau_accuracy: the absolute bound on the error of tau (median) and of tau_ci's ends.
    """

    k: int
    likelihood: str
    scale: str
    mu: float
    se: float
    ci: tuple[float, float]
    tau: float
    tau2: float
    tau_ci: tuple[float, float]
    i2: float | None
    q: float
    prediction: tuple[float, float]
    predictive: Predictive
    tau_prior: str
    mu_prior: str
    accuracy: float
    tau_accuracy: float
    notes: tuple[str, ...] = ()
    method: str = "bayes"

    def to_dict(self, include_grid: bool = False) -> dict[str, Any]:
        """JSON-ready plain types; the density grid only when asked."""
        return {
            "k": self.k,
            "method": self.method,
            "likelihood": self.likelihood,
            "scale": self.scale,
            "mu": self.mu,
            "se": self.se,
            "ci": list(self.ci),
            "tau": self.tau,
            "tau2": self.tau2,
            "tau_ci": list(self.tau_ci),
            "i2": self.i2,
            "q": self.q,
            "prediction": list(self.prediction),
            "predictive": self.predictive.to_dict(include_grid),
            "tau_prior": self.tau_prior,
            "mu_prior": self.mu_prior,
            "accuracy": self.accuracy,
            "tau_accuracy": self.tau_accuracy,
            "notes": list(self.notes),
        }


@dataclass(frozen=True)
class Posterior:
    """The integration result common to all models, before it becomes a BayesResult."""

    mu: KernelSum
    u: KernelSum
    tau2_mean: float
    predictive: KernelSum


def tau_summary(u: np.ndarray, weight: np.ndarray, step: float) -> KernelSum:
    """The posterior of u = log tau from node weights, smoothed by kernels of 1.5 x spacing."""
    return KernelSum(u, weight, np.zeros(u.size), np.full(u.size, 1.5 * step))


def assemble(
    post: Posterior,
    *,
    k: int,
    likelihood: str,
    scale: str,
    y_approx: np.ndarray,
    se_approx: np.ndarray,
    tau_prior: TauPrior,
    mu_prior: MuPrior,
    notes: Sequence[str],
) -> BayesResult:
    """The result of an integration: summaries, predictive quantiles and density grid."""
    tail = (1 - CREDIBLE_LEVEL) / 2
    mu_lo, mu_hi = post.mu.ppf([tail, 1 - tail])
    u_q = post.u.ppf([tail, 0.5, 1 - tail])
    pred = post.predictive
    levels = sorted({*QUANTILE_LEVELS, tail, 1 - tail, 1e-4, 1 - 1e-4})
    qs = dict(zip(levels, pred.ppf(levels), strict=True))
    span = qs[1 - 1e-4] - qs[1e-4]
    x = np.linspace(qs[1e-4] - 0.1 * span, qs[1 - 1e-4] + 0.1 * span, _GRID_POINTS)
    sd = math.sqrt(pred.var())
    het = heterogeneity(y_approx, se_approx)
    tau_hi = float(math.exp(u_q[2]))
    return BayesResult(
        k=k,
        likelihood=likelihood,
        scale=scale,
        mu=post.mu.mean(),
        se=math.sqrt(post.mu.var()),
        ci=(float(mu_lo), float(mu_hi)),
        tau=float(math.exp(u_q[1])),
        tau2=post.tau2_mean,
        tau_ci=(float(math.exp(u_q[0])), tau_hi),
        i2=het.i2,
        q=het.q,
        prediction=(float(qs[tail]), float(qs[1 - tail])),
        predictive=Predictive(
            mean=pred.mean(),
            sd=sd,
            quantiles={_key(q): float(qs[q]) for q in QUANTILE_LEVELS},
            x=x,
            density=pred.pdf(x),
            _dist=pred,
        ),
        tau_prior=tau_prior.describe(),
        mu_prior=mu_prior.describe(),
        accuracy=QUANTILE_ACCURACY * max(1.0, sd),
        tau_accuracy=TAU_ACCURACY * max(1.0, tau_hi),
        notes=tuple(notes),
    )
