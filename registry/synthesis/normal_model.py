"""The normal-normal hierarchical model, integrated in closed form in mu and by quadrature in tau.

Model (Spiegelhalter, Abrams & Myles 2004, *Bayesian Approaches to Clinical Trials and
Health-Care Evaluation*, ch. 3 and 5):

    study i's latent parameter  theta_i | mu, tau ~ N(mu + b_i, tau² + v_i)
    its estimate                y_i | theta_i ~ N(theta_i, se_i²), the likelihood raised to a_i
    priors                      tau ~ p(tau) proper, mu ~ flat or N(m0, s0²)

(a_i, b_i, v_i: see `registry.synthesis.inputs`.) mu is integrated in closed form. With
w_i = 1/(se_i²/a_i + tau² + v_i) (a normal mu prior enters as one more observation m0 with
variance s0²),
    mu | tau, y ~ N(m(tau), 1/W),  W = sum w_i,  m = sum w_i (y_i - b_i) / W,
    log p(y | tau) = -1/2 sum log(1/w_i) - 1/2 log W - 1/2 sum w_i (y_i - b_i - m)² + const.
tau is integrated on the log-tau grid of `registry.synthesis.logtau`.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from registry.errors import InputError
from registry.synthesis.bayes_result import BayesResult, Posterior, assemble, tau_summary
from registry.synthesis.hyperpriors import MuPrior, TauPrior, resolve_priors
from registry.synthesis.inputs import as_array, discount
from registry.synthesis.kernels import KernelSum
from registry.synthesis.logtau import (
    check_refine,
    cutoff_for,
    locate,
    log_tau_nodes,
    tau_search_range,
)
from registry.values.scales import SCALES


def normal_conditional(
    y: np.ndarray, var: np.ndarray, tau2: np.ndarray, mu_prior: MuPrior
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """log p(y | tau) + const, and mu | tau, y ~ N(m, 1/W), for each tau² (closed form)."""
    v = var[None, :] + tau2[:, None]
    w = 1.0 / v
    big_w = w.sum(axis=1)
    wy = w @ y
    sum_log_v = np.log(v).sum(axis=1)
    if not mu_prior.is_flat:
        m0, s0 = mu_prior.params
        big_w = big_w + 1 / s0**2
        wy = wy + m0 / s0**2
    m = wy / big_w
    resid = w @ (y * y) - 2 * m * wy + m * m * w.sum(axis=1)
    if not mu_prior.is_flat:
        resid = resid + (m0 * m0 - 2 * m * m0 + m * m) / s0**2
    log_marg = -0.5 * sum_log_v - 0.5 * np.log(big_w) - 0.5 * resid
    return log_marg, m, 1.0 / big_w


def _integrate_normal(
    y: np.ndarray, var: np.ndarray, tau_prior: TauPrior, mu_prior: MuPrior, refine: float
) -> Posterior:
    """Posterior and predictive of the normal model for y_i with total variances var_i."""
    cutoff = cutoff_for(refine)

    def log_post(u: np.ndarray) -> np.ndarray:
        return (
            normal_conditional(y, var, np.exp(2 * u), mu_prior)[0] + tau_prior.logpdf(np.exp(u)) + u
        )

    lo, hi, sd = locate(log_post, *tau_search_range(tau_prior, y, var), cutoff)
    u, step = log_tau_nodes(lo, hi, sd, refine)
    tau2 = np.exp(2 * u)
    log_marg, m, v = normal_conditional(y, var, tau2, mu_prior)
    lp = log_marg + tau_prior.logpdf(np.exp(u)) + u
    w = np.exp(lp - lp.max())
    w /= w.sum()
    sd_mu = np.sqrt(v)
    return Posterior(
        mu=KernelSum(m, w, sd_mu, sd_mu),
        u=tau_summary(u, w, step),
        tau2_mean=float(w @ tau2),
        predictive=KernelSum(m, w, np.sqrt(v + tau2), np.sqrt(v + tau2)),
    )


def fit_normal(
    y: Any,
    se: Any,
    tau_prior: TauPrior | str,
    mu_prior: MuPrior | str | None = None,
    *,
    power: Any = None,
    bias_shift: Any = None,
    bias_var: Any = None,
    scale: str = "identity",
    refine: float = 1.0,
) -> BayesResult:
    """Normal-normal hierarchical model for estimates y_i with known standard errors se_i.

    Marginally y_i | mu, tau ~ N(mu + b_i, se_i²/a_i + tau² + v_i): a power a_i multiplies the
    precision (Ibrahim & Chen 2000), a bias adds b_i to the mean and v_i to the variance
    (Turner et al. 2009). mu is integrated in closed form, tau by quadrature on log tau.
    """
    y = as_array("y", y)
    se = as_array("se", se, y.size)
    if np.any(se <= 0):
        raise InputError("standard errors must be positive", field="se")
    if scale not in SCALES:
        raise InputError(f"unknown scale {scale!r}; one of {', '.join(SCALES)}", field="scale")
    tp, mp = resolve_priors(tau_prior, mu_prior)
    d = discount(y.size, power, bias_shift, bias_var)
    post = _integrate_normal(y - d.shift, se**2 / d.power + d.var, tp, mp, check_refine(refine))
    return assemble(
        post,
        k=y.size,
        likelihood="normal",
        scale=scale,
        y_approx=y,
        se_approx=se,
        tau_prior=tp,
        mu_prior=mp,
        notes=d.notes,
    )
