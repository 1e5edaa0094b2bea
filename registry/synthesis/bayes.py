"""Bayesian hierarchical pooling: the fit functions, gathered from the modules that do the work.

Kept for `tests/test_mixture.py`, which imports `fit_binomial` from here. New code imports
from `registry.synthesis` (or the module that defines a name).
"""

from registry.synthesis.count_models import fit_binomial, fit_poisson
from registry.synthesis.normal_model import fit_normal

__all__ = ["fit_binomial", "fit_normal", "fit_poisson"]
