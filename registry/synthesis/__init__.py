"""Pooling of estimates: frequentist (`frequentist.pool`) and Bayesian hierarchical models.

Bayesian modules by responsibility: `hyperpriors` (TauPrior, MuPrior), `kernels` (kernel sums
for smooth distribution functions), `logtau` (the log-tau grid), `normal_model` (closed form in
mu), `count_likelihoods` (binomial-logit and Poisson-log declarations) over `count_models` (the
adaptive mu grid and adaptive Gauss-Hermite), `bayes_result` (result types and assembly);
`result` holds the contract every pooled result satisfies.
"""

from registry.synthesis.bayes_result import QUANTILE_ACCURACY, TAU_ACCURACY, BayesResult, Predictive
from registry.synthesis.count_likelihoods import LIKELIHOODS
from registry.synthesis.count_models import fit_binomial, fit_counts, fit_poisson
from registry.synthesis.hyperpriors import MuPrior, TauPrior
from registry.synthesis.normal_model import fit_normal
from registry.synthesis.result import PooledResult

__all__ = [
    "LIKELIHOODS",
    "QUANTILE_ACCURACY",
    "TAU_ACCURACY",
    "BayesResult",
    "MuPrior",
    "PooledResult",
    "Predictive",
    "TauPrior",
    "fit_binomial",
    "fit_counts",
    "fit_normal",
    "fit_poisson",
]
