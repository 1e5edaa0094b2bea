"""Hierarchical models with exact count likelihoods: one machine over the declared likelihoods.

Model (Spiegelhalter, Abrams & Myles 2004, ch. 3 and 5): theta_i | mu, tau ~ N(mu + b_i,
tau² + v_i), the data of study i from an exact count likelihood in theta_i (binomial-logit or
Poisson-log, declared in `registry.synthesis.count_likelihoods`), raised to a_i; tau ~ a
proper prior, mu ~ flat or normal.

Integration (no sampling): tau on the log-tau grid of `registry.synthesis.logtau`, placed by
the normal approximation and then extended and refined until the exact posterior is resolved.
For each tau node, mu is integrated by the trapezoid rule on a grid centred on its conditional
posterior, and each study's latent theta_i by adaptive Gauss-Hermite quadrature about the mode
of likelihood x normal density (Liu & Pierce 1994, Biometrika 81:624), the mode found by
Newton steps. Distributions of mu and of the predictive are kernel sums
(`registry.synthesis.kernels`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Unpack

import numpy as np

from registry.errors import InputError, NumericalError
from registry.synthesis.bayes_result import BayesResult, Posterior, assemble, tau_summary
from registry.synthesis.count_likelihoods import LIKELIHOODS, CountLikelihood
from registry.synthesis.hyperpriors import MuPrior, TauPrior, resolve_priors
from registry.synthesis.inputs import Discount, FitOptions, as_array, discount
from registry.synthesis.kernels import CHUNK, KernelSum
from registry.synthesis.logtau import (
    check_refine,
    cutoff_for,
    locate,
    log_tau_nodes,
    log_tau_step,
    tau_search_range,
)
from registry.synthesis.normal_model import normal_conditional

# Gauss-Hermite order by a study's information (fewest of events and non-events, or events):
# (at least, nodes), the last row for the rest. The orders were chosen by measuring the error
# against 80-node rules over tau up to 5; the 32-node row by the refinement tests of the
# extreme predictive quantiles (single-event pump-failure counts needed more than 16).
_GH_ORDERS = ((50, 8), (10, 12), (0, 32))
_NEWTON_STEPS = 4
# mu-grid node spacing as a fraction of the conditional posterior sd of mu
_SPACING = 0.4


@dataclass(frozen=True)
class _CountData:
    """Counts, sizes and power weights of studies, with their likelihood's declaration.

    log-likelihood and derivatives are the declared ones times a_i (Ibrahim & Chen 2000).
    """

    kind: CountLikelihood
    events: np.ndarray
    size: np.ndarray
    power: np.ndarray

    def loglik(self, theta: np.ndarray) -> np.ndarray:
        """theta has shape (..., k, q): q Gauss-Hermite points per study."""
        col = (self.events[:, None], self.size[:, None])
        return self.power[:, None] * self.kind.loglik(theta, *col)

    def derivatives(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """First and second derivatives in theta, shape (..., k)."""
        g, h = self.kind.derivatives(theta, self.events, self.size)
        return self.power * g, self.power * h

    def normal_approx(self) -> tuple[np.ndarray, np.ndarray]:
        return self.kind.normal_approx(self.events, self.size)

    def subset(self, idx: np.ndarray) -> _CountData:
        return _CountData(self.kind, self.events[idx], self.size[idx], self.power[idx])


@dataclass(frozen=True)
class _StudyGroup:
    """Studies integrated with one Gauss-Hermite order, with their bias terms and the
    normal-approximation start for Newton's method."""

    lik: _CountData
    shift: np.ndarray
    var: np.ndarray
    nodes: np.ndarray
    weights: np.ndarray
    start: np.ndarray
    start_prec: np.ndarray


def _quadrature_groups(lik: _CountData, d: Discount, refine: float) -> list[_StudyGroup]:
    """Split the studies by Gauss-Hermite order: the further a study's likelihood is from
    normal (fewer events, or fewer non-events), the more nodes (orders chosen by measuring
    the error against 80-node rules over tau up to 5)."""
    information = lik.kind.information(lik.events, lik.size)
    order = np.select(
        [information >= least for least, _ in _GH_ORDERS[:-1]],
        [nodes for _, nodes in _GH_ORDERS[:-1]],
        _GH_ORDERS[-1][1],
    )
    y0, se0 = lik.normal_approx()
    groups = []
    for q in np.unique(order):
        idx = np.flatnonzero(order == q)
        nodes, weights = np.polynomial.hermite.hermgauss(round(q * refine))
        part = lik.subset(idx)
        groups.append(
            _StudyGroup(
                part,
                d.shift[idx],
                d.var[idx],
                nodes,
                weights,
                y0[idx],
                d.power[idx] / se0[idx] ** 2,
            )
        )
    return groups


def _latent_log_marginal(group: _StudyGroup, centre: np.ndarray, var: np.ndarray) -> np.ndarray:
    """log int L_i(theta) N(theta | centre, var) dtheta by adaptive Gauss-Hermite.

    Shapes broadcast to (..., k). Newton steps from the normal-approximation mode locate the
    integrand's mode theta*; with sigma = (-d²/dtheta² log integrand)^(-1/2) at theta*,
        int e^f = sqrt(2) sigma sum_q w_q exp(x_q² + f(theta* + sqrt(2) sigma x_q))
    (Liu & Pierce 1994).
    """
    lik, nodes, weights = group.lik, group.nodes, group.weights
    start, start_prec = group.start, group.start_prec
    prec = 1.0 / var
    theta = (start * start_prec + centre * prec) / (start_prec + prec)
    for _ in range(_NEWTON_STEPS):
        g, h = lik.derivatives(theta)
        g = g - (theta - centre) * prec
        h = h - prec
        step = -g / h
        limit = 3.0 / np.sqrt(-h) + 1.0
        theta = theta + np.clip(step, -limit, limit)
    h = lik.derivatives(theta)[1] - prec
    sigma = 1.0 / np.sqrt(-h)
    pts = theta[..., None] + math.sqrt(2.0) * sigma[..., None] * nodes
    f = (
        lik.loglik(pts)
        - 0.5 * (pts - centre[..., None]) ** 2 * prec[..., None]
        - 0.5 * np.log(2 * math.pi * var[..., None])
    )
    f += nodes**2 + np.log(weights)
    top = f.max(axis=-1)
    return np.log(math.sqrt(2.0) * sigma) + top + np.log(np.exp(f - top[..., None]).sum(axis=-1))


@dataclass(frozen=True)
class _MuGrid:
    """For each log-tau node (row), a uniform mu grid and the log joint posterior on it,
    stored flat: point p lies in row `row[p]`, whose grid spacing is `step[p]`."""

    mu: np.ndarray
    lp: np.ndarray  # log p(mu, u | y) + const
    step: np.ndarray
    row: np.ndarray


def _count_mu_grid(
    lik: _CountData,
    d: Discount,
    tau_prior: TauPrior,
    mu_prior: MuPrior,
    u: np.ndarray,
    centre: np.ndarray,
    sd: np.ndarray,
    refine: float,
    cutoff: float,
) -> _MuGrid:
    """Evaluate the exact log posterior on a mu grid per tau node.

    A row's grid starts as centre +- 1.25 sqrt(2 cutoff) sd (sd of the normal approximation)
    at spacing 0.4 sd; a row whose log posterior has not fallen by `cutoff` at both ends, or
    whose spacing exceeds 0.5 of its exact conditional sd, is laid again from its exact
    moments and extent.
    """
    groups = _quadrature_groups(lik, d, refine)
    tau = np.exp(u)
    log_prior_u = tau_prior.logpdf(tau) + u
    step = np.empty(u.size)
    first_index = np.empty(u.size, dtype=np.int64)
    count = np.empty(u.size, dtype=np.int64)

    def lay(r: int, lo: float, hi: float, spacing: float) -> None:
        # Rows whose predictive kernels are sharpened (tau < 1.5 spacing) share a lattice of
        # power-of-two spacings, so that `_KernelSum` can merge their kernels.
        if tau[r] < 1.5 * spacing:
            spacing = 2.0 ** math.floor(math.log2(spacing))
        step[r] = spacing
        first_index[r] = math.floor(lo / spacing)
        count[r] = math.ceil(hi / spacing) - first_index[r] + 1

    half = 1.25 * math.sqrt(2 * cutoff)
    for r in range(u.size):
        lay(r, centre[r] - half * sd[r], centre[r] + half * sd[r], sd[r] * _SPACING / refine)
    grids: list[np.ndarray] = [np.empty(0)] * u.size
    lps: list[np.ndarray] = [np.empty(0)] * u.size
    todo = np.arange(u.size)
    for _ in range(16):
        for n in np.unique(count[todo]):
            same = todo[count[todo] == n]
            per_chunk = max(1, CHUNK // (n * lik.events.size * _GH_ORDERS[-1][1]))
            for rows in np.array_split(same, math.ceil(same.size / per_chunk)):
                grid = step[rows, None] * (first_index[rows, None] + np.arange(n))
                lp = mu_prior.logpdf(grid) + log_prior_u[rows, None]
                for group in groups:
                    var = np.broadcast_to(
                        (tau[rows, None] ** 2 + group.var)[:, None, :],
                        (*grid.shape, group.var.size),
                    )
                    lp = lp + _latent_log_marginal(group, grid[..., None] + group.shift, var).sum(
                        axis=-1
                    )
                for j, r in enumerate(rows):
                    grids[r], lps[r] = grid[j], lp[j]
        bad = []
        for r in todo:
            grid, lp = grids[r], lps[r]
            peak = lp.max()
            inside = np.flatnonzero(lp > peak - cutoff)
            w = np.exp(lp - peak)
            mean = float(w @ grid / w.sum())
            cond_sd = math.sqrt(float(w @ (grid - mean) ** 2 / w.sum()))
            first, last = int(inside[0]), int(inside[-1])
            touching = first == 0 or last == grid.size - 1
            if not touching and step[r] <= 1.25 * _SPACING * cond_sd / refine:
                continue
            bad.append(r)
            if touching:
                # walk the window towards the mass, at the same spacing
                span = grid[-1] - grid[0]
                lay(
                    r,
                    grid[first] - (0.5 * span if first == 0 else 2 * step[r]),
                    grid[last] + (0.5 * span if last == grid.size - 1 else 2 * step[r]),
                    step[r],
                )
            else:
                lay(
                    r,
                    grid[first] - 2 * step[r],
                    grid[last] + 2 * step[r],
                    _SPACING * cond_sd / refine,
                )
        if not bad:
            return _MuGrid(
                mu=np.concatenate(grids),
                lp=np.concatenate(lps),
                step=np.repeat(step, count),
                row=np.repeat(np.arange(u.size), count),
            )
        todo = np.asarray(bad)
    raise NumericalError(
        "the conditional posterior of mu could not be resolved; try a normal "
        "mu prior, a tighter tau prior or refine=2"
    )


def _integrate_counts(
    lik: _CountData, d: Discount, tau_prior: TauPrior, mu_prior: MuPrior, refine: float
) -> Posterior:
    cutoff = cutoff_for(refine)
    y0, se0 = lik.normal_approx()
    var0 = se0**2 / d.power + d.var
    y0 = y0 - d.shift

    def approx_log_post(uu: np.ndarray) -> np.ndarray:
        return (
            normal_conditional(y0, var0, np.exp(2 * uu), mu_prior)[0]
            + tau_prior.logpdf(np.exp(uu))
            + uu
        )

    lo, hi, sd_u = locate(approx_log_post, *tau_search_range(tau_prior, y0, var0), cutoff)
    # the normal approximation only places the grid; the exact posterior decides its extent
    lo, hi = lo - 2 * sd_u, hi + 2 * sd_u
    for _ in range(6):
        u, step = log_tau_nodes(lo, hi, sd_u, refine)
        _, m0, v0 = normal_conditional(y0, var0, np.exp(2 * u), mu_prior)
        grid = _count_mu_grid(lik, d, tau_prior, mu_prior, u, m0, np.sqrt(v0), refine, cutoff)
        lpu = np.full(u.size, -np.inf)
        np.logaddexp.at(lpu, grid.row, grid.lp + np.log(grid.step))
        top = lpu.max()
        inside = np.flatnonzero(lpu > top - cutoff)
        wu = np.exp(lpu - top)
        mean_u = float(wu @ u / wu.sum())
        exact_sd = math.sqrt(float(wu @ (u - mean_u) ** 2 / wu.sum()))
        width = max(u[inside[-1]] - u[inside[0]], 6 * exact_sd)
        grow_lo, grow_hi = inside[0] == 0, inside[-1] == u.size - 1
        fine = step <= 1.25 * log_tau_step(exact_sd, refine)
        if fine and not (grow_lo or grow_hi):
            break
        lo = u[inside[0]] - (0.5 * width if grow_lo else step)
        hi = u[inside[-1]] + (0.5 * width if grow_hi else step)
        sd_u = exact_sd
    else:
        raise NumericalError(
            "the posterior of tau could not be resolved; try refine=2 or a "
            "tau prior on the scale of the data"
        )
    w = np.exp(grid.lp - grid.lp.max()) * grid.step
    w /= w.sum()
    tau = np.exp(u)
    smooth = 1.5 * grid.step
    width_p = tau[grid.row]
    wu = np.bincount(grid.row, weights=w, minlength=u.size)
    return Posterior(
        mu=KernelSum(grid.mu, w, 0.0, smooth),
        u=tau_summary(u, wu, step),
        tau2_mean=float(wu @ tau**2),
        predictive=KernelSum(grid.mu, w, width_p, np.maximum(width_p, smooth)),
    )


def fit_counts(
    likelihood: str,
    events: Any,
    sizes: Any,
    tau_prior: TauPrior | str,
    mu_prior: MuPrior | str | None = None,
    *,
    power: Any = None,
    bias_shift: Any = None,
    bias_var: Any = None,
    refine: float = 1.0,
) -> BayesResult:
    """The hierarchical model with the exact count likelihood named `likelihood` (a key of
    `LIKELIHOODS`): totals for "binomial", exposures for "poisson" as `sizes`."""
    if likelihood not in LIKELIHOODS:
        raise InputError(
            f"unknown count likelihood {likelihood!r}; one of {', '.join(LIKELIHOODS)}",
            field="likelihood",
        )
    kind = LIKELIHOODS[likelihood]
    y = as_array("events", events)
    n = as_array(kind.size_name, sizes, y.size)
    if np.any(y < 0) or np.any(y != np.round(y)):
        raise InputError("events must be whole numbers >= 0", field="events")
    kind.check(y, n)
    tp, mp = resolve_priors(tau_prior, mu_prior)
    if mp.is_flat and not kind.proper_with_flat_mu(y, n):
        raise InputError(
            "with these counts a flat mu prior gives an improper posterior; "
            "give a normal mu prior such as normal:0,10",
            field="mu_prior",
        )
    d = discount(y.size, power, bias_shift, bias_var)
    data = _CountData(kind, y, n, d.power)
    post = _integrate_counts(data, d, tp, mp, check_refine(refine))
    y_approx, se_approx = data.normal_approx()
    return assemble(
        post,
        k=y.size,
        likelihood=kind.name,
        scale=kind.scale,
        y_approx=y_approx,
        se_approx=se_approx,
        tau_prior=tp,
        mu_prior=mp,
        notes=d.notes,
    )


def fit_binomial(
    events: Any,
    totals: Any,
    tau_prior: TauPrior | str,
    mu_prior: MuPrior | str | None = None,
    **options: Unpack[FitOptions],
) -> BayesResult:
    """Binomial-logit hierarchical model for single-arm proportions events_i / totals_i.

    y_i ~ Bin(n_i, expit(theta_i)), theta_i ~ N(mu + b_i, tau² + v_i); the likelihood is exact
    (each theta_i integrated by adaptive Gauss-Hermite), raised to a_i when `power` is given.
    Results are on the logit scale. `options`: power, bias_shift, bias_var, refine.
    """
    return fit_counts("binomial", events, totals, tau_prior, mu_prior, **options)


def fit_poisson(
    events: Any,
    exposures: Any,
    tau_prior: TauPrior | str,
    mu_prior: MuPrior | str | None = None,
    **options: Unpack[FitOptions],
) -> BayesResult:
    """Poisson-log hierarchical model for event counts y_i over exposures E_i.

    y_i ~ Poisson(E_i exp(theta_i)), theta_i ~ N(mu + b_i, tau² + v_i); the likelihood is
    exact, raised to a_i when `power` is given. Results are on the log-rate scale. `options`:
    power, bias_shift, bias_var, refine.
    """
    return fit_counts("poisson", events, exposures, tau_prior, mu_prior, **options)
