"""The log-tau grid: where the posterior of tau lies, and the nodes laid over it.

tau is integrated by the trapezoid rule on u = log tau over the region where the log
posterior is within `CUTOFF` of its maximum. The integrand in u is analytic and decays at
least exponentially in both directions, so the rule converges geometrically in the node
spacing (Trefethen & Weideman 2014, SIAM Review 56:385).

Node spacing: `LOG_TAU_SPACING` x the posterior sd of u, at most `MAX_LOG_TAU_STEP`, divided
by `refine`. Both were 0.4 until refinement showed the 0.5% and 99.5% predictive quantiles
of sparse count data (five of the pump-failure counts, tau ~ half-normal(0.5)) off by up to
20 x the stated accuracy. At 0.24 (with 32 Gauss-Hermite nodes for the sparsest studies, see
`registry.synthesis.count_models`) the default fit agreed with refine = 2 and 3 within 7% of
the bound in 63 cases tried (BCG trial arms, pump counts and subsets of both, seven tau
priors); `tests/test_bayes.py` keeps six of them.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

from registry.errors import InputError, NumericalError
from registry.synthesis.hyperpriors import TauPrior

# Log-posterior drop that bounds the integration region: exp(-25) ~ 1e-11 of the peak.
CUTOFF = 25.0
LOG_TAU_SPACING = 0.24
MAX_LOG_TAU_STEP = 0.24


def cutoff_for(refine: float) -> float:
    """The integration region's log-posterior drop, widened with `refine`."""
    return CUTOFF + 8 * math.log2(refine)


def check_refine(refine: float) -> float:
    """`refine` as a float, if it lies in [1, 8]."""
    if not (math.isfinite(refine) and 1 <= refine <= 8):
        raise InputError(f"refine must be between 1 and 8, got {refine}", field="refine")
    return float(refine)


def locate(
    log_post: Callable[[np.ndarray], np.ndarray], lo: float, hi: float, cutoff: float
) -> tuple[float, float, float]:
    """Zoom in on the region of u = log tau where log_post > max - cutoff.

    Returns (lo, hi, sd) of that region and the posterior sd of u there. Extends the search
    interval when the region touches it.
    """
    for _ in range(12):
        u = np.linspace(lo, hi, 161)
        lp = log_post(u)
        if not np.isfinite(lp.max()):
            raise NumericalError(
                "the posterior of tau vanishes everywhere; check the data, or try a wider tau prior"
            )
        keep = np.flatnonzero(lp > lp.max() - cutoff)
        if keep[0] == 0 and lo > -700:
            lo -= 0.5 * (hi - lo) + 5
            continue
        if keep[-1] == u.size - 1 and hi < 700:
            hi += 0.5 * (hi - lo) + 5
            continue
        a, b = keep[0] - 1, keep[-1] + 1
        lo, hi = float(u[a]), float(u[b])
        if b - a >= 60:
            w = np.exp(lp[a : b + 1] - lp.max())
            uu = u[a : b + 1]
            mean = float(w @ uu / w.sum())
            sd = math.sqrt(float(w @ (uu - mean) ** 2 / w.sum()))
            return lo, hi, sd
    raise NumericalError(
        "could not locate the posterior of tau; try a tau prior with a "
        "scale nearer the spread of the estimates"
    )


def log_tau_step(sd: float, refine: float) -> float:
    """The node spacing in u for a posterior sd `sd` of u."""
    return min(MAX_LOG_TAU_STEP, LOG_TAU_SPACING * sd) / refine


def log_tau_nodes(lo: float, hi: float, sd: float, refine: float) -> tuple[np.ndarray, float]:
    """Equally spaced nodes covering [lo, hi], and their spacing."""
    step = log_tau_step(sd, refine)
    n = math.ceil((hi - lo) / step) + 1
    return lo + step * np.arange(n), step


def tau_search_range(tau_prior: TauPrior, y: np.ndarray, var: np.ndarray) -> tuple[float, float]:
    """Where `locate` starts: the prior's range, widened to the scale of the data."""
    lo, hi = tau_prior.log_tau_range(CUTOFF)
    spread = float(np.ptp(y) + math.sqrt(var.max()))
    return (min(lo, math.log(math.sqrt(var.min())) - CUTOFF), max(hi, math.log(spread) + 5.0))
