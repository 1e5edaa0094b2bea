"""Bayesian hierarchical pooling by deterministic integration, and the predictive of a new study.

Model (normal-normal hierarchical model; Spiegelhalter, Abrams & Myles 2004, *Bayesian
Approaches to Clinical Trials and Health-Care Evaluation*, ch. 3 and 5):

    study i's latent parameter  theta_i | mu, tau ~ N(mu + b_i, tau² + v_i)
    its data                    y_i | theta_i       (normal with known se_i, binomial-logit or
                                                     Poisson-log, the likelihood raised to a_i)
    priors                      tau ~ p(tau) proper (half-normal, half-t, log-normal),
                                mu ~ flat or N(m0, s0²)

`a_i` in (0, 1] is the power-prior weight (Ibrahim & Chen 2000, Stat Sci 15:46); `b_i`, `v_i`
the mean and variance of an additive bias beta_i ~ N(b_i, v_i) with theta_i = mu + delta_i +
beta_i (Turner, Spiegelhalter, Smith & Thompson 2009, JRSS A 172:21). The predictive of a new
study's parameter, theta_new | mu, tau ~ N(mu, tau²) integrated over the posterior, is the
meta-analytic-predictive prior of Neuenschwander, Capkun-Niggli, Branson & Spiegelhalter
(2010, Clinical Trials 7:5).

Integration (no sampling):
- tau is integrated by the trapezoid rule on u = log tau over the region where the log
  posterior is within `_CUTOFF` of its maximum. The integrand in u is analytic and decays at
  least exponentially in both directions, so the rule converges geometrically in the node
  spacing (Trefethen & Weideman 2014, SIAM Review 56:385).
- normal model: mu is integrated in closed form. With w_i = 1/(se_i²/a_i + tau² + v_i)
  (a normal mu prior enters as one more observation m0 with variance s0²),
      mu | tau, y ~ N(m(tau), 1/W),  W = sum w_i,  m = sum w_i (y_i - b_i) / W,
      log p(y | tau) = -1/2 sum log(1/w_i) - 1/2 log W - 1/2 sum w_i (y_i - b_i - m)² + const.
- count models: for each tau node, mu is integrated by the trapezoid rule on a grid centred
  on its conditional posterior, and each study's latent theta_i by adaptive Gauss-Hermite
  quadrature about the mode of likelihood x normal density (Liu & Pierce 1994, Biometrika
  81:624), the mode found by Newton steps.
- distribution functions of point-mass sums (mu and tau in the count models, and the
  predictive where tau is small beside the mu grid) are made smooth without bias: each node is
  given a Gaussian kernel of sd s = 1.5 x spacing, and the added variance is removed exactly up
  to truncation by the backward heat series exp(-c D²/2) (c = s² - width²); in terms of
  Hermite polynomials (Mehler's identity, recalled), per node with z = (x - loc)/s and
  gamma = c / (2 s²):
      F(x) = Phi(z) - phi(z) sum_{n>=1} (-gamma)^n / n! He_{2n-1}(z),
      f(x) = phi(z)/s [1 + sum_{n>=1} (-gamma)^n / n! He_{2n}(z)].
  The series reproduces the target sd exactly (its n = 1 term alone does so for the variance).

Accuracy: `QUANTILE_ACCURACY` is the stated bound on the error of the predictive quantiles,
in units of max(1, predictive sd) on the analysis scale; the result carries the absolute
figure. `refine` > 1 narrows every spacing, raises the Gauss-Hermite order and widens the cut,
so that a test can confirm the bound by refinement.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy import special, stats

from registry.errors import InputError, NumericalError
from registry.synthesis.heterogeneity import heterogeneity
from registry.values.scales import SCALES

QUANTILE_ACCURACY = 1e-5
QUANTILE_LEVELS = (0.005, 0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975, 0.995)
CREDIBLE_LEVEL = 0.95

# Log-posterior drop that bounds the integration region: exp(-25) ~ 1e-11 of the peak.
_CUTOFF = 25.0
_GH_NODES = 16
_NEWTON_STEPS = 4
_DECONV_TERMS = 10
_GRID_POINTS = 401
# Node spacing as a fraction of the local posterior sd (mu grids and the log-tau grid).
_SPACING = 0.4
_MAX_LOG_TAU_STEP = 0.4
_CHUNK = 2_000_000
_PRUNE = 1e-13
_SQRT2PI = math.sqrt(2 * math.pi)


def _key(level: float) -> str:
    return f"{level:g}"


# --------------------------------------------------------------------------------------
# priors


_TAU_FORMS = "half-normal:SCALE, half-t:SCALE,DF or log-normal:MU,SIGMA (of log tau)"


@dataclass(frozen=True)
class TauPrior:
    """A proper prior on the between-study sd tau.

    - half-normal(s): p(tau) = 2/s phi(tau/s), tau > 0;
    - half-t(s, nu): p(tau) = 2/s t_nu(tau/s), tau > 0 (Gelman 2006, Bayesian Anal 1:515);
    - log-normal(m, sigma): log tau ~ N(m, sigma²).
    """

    family: str
    params: tuple[float, ...]

    def __post_init__(self) -> None:
        arity = {"half-normal": 1, "half-t": 2, "log-normal": 2}
        if self.family not in arity:
            raise InputError(
                f"unknown tau prior {self.family!r}; use {_TAU_FORMS}", field="tau_prior"
            )
        params = tuple(float(p) for p in self.params)
        if len(params) != arity[self.family] or not all(map(math.isfinite, params)):
            raise InputError(
                f"{self.family} takes {arity[self.family]} finite number(s); use {_TAU_FORMS}",
                field="tau_prior",
            )
        positive = params if self.family != "log-normal" else params[1:]
        if any(p <= 0 for p in positive):
            raise InputError(
                f"the scale, df and sigma of a tau prior must be positive, got "
                f"{self.describe_params(params)}; use {_TAU_FORMS}",
                field="tau_prior",
            )
        object.__setattr__(self, "params", params)

    @classmethod
    def parse(cls, text: str) -> TauPrior:
        """Read 'half-normal:0.5', 'half-t:0.5,3' (scale, df) or 'log-normal:-2,1.5'."""
        family, sep, rest = str(text).strip().partition(":")
        if not sep:
            raise InputError(f"cannot read tau prior {text!r}; use {_TAU_FORMS}", field="tau_prior")
        try:
            params = tuple(float(p) for p in rest.split(","))
        except ValueError:
            raise InputError(
                f"cannot read the numbers in tau prior {text!r}; use {_TAU_FORMS}",
                field="tau_prior",
            ) from None
        return cls(family.strip().lower(), params)

    @staticmethod
    def describe_params(params: Sequence[float]) -> str:
        return ",".join(f"{p:g}" for p in params)

    def describe(self) -> str:
        """The prior in the form `parse` reads."""
        return f"{self.family}:{self.describe_params(self.params)}"

    def logpdf(self, tau: Any) -> np.ndarray:
        """log p(tau), -inf for tau <= 0."""
        tau = np.asarray(tau, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.family == "half-normal":
                (s,) = self.params
                out = math.log(2.0) + stats.norm.logpdf(tau, scale=s)
            elif self.family == "half-t":
                s, df = self.params
                out = math.log(2.0) + stats.t.logpdf(tau / s, df) - math.log(s)
            else:
                m, sigma = self.params
                out = stats.norm.logpdf(np.log(tau), m, sigma) - np.log(tau)
        return np.where(tau > 0, out, -np.inf)

    def log_tau_range(self) -> tuple[float, float]:
        """An interval of log tau holding all but ~exp(-_CUTOFF) of the prior's mass."""
        if self.family == "log-normal":
            m, sigma = self.params
            half = math.sqrt(2 * _CUTOFF) * sigma
            return m - half, m + half
        s = self.params[0]
        # below s e^-C the mass is ~ e^-C (density bounded at 0); above, the tails decay like
        # exp(-tau²/2s²) or (tau/s)^-df.
        upper = (
            math.log(math.sqrt(2 * _CUTOFF))
            if self.family == "half-normal"
            else _CUTOFF / self.params[1] + 1.0
        )
        return math.log(s) - _CUTOFF, math.log(s) + upper


_MU_FORMS = "flat or normal:MEAN,SD"


@dataclass(frozen=True)
class MuPrior:
    """The prior on the overall mean mu: flat (improper, uniform) or N(mean, sd²)."""

    family: str = "flat"
    params: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        params = tuple(float(p) for p in self.params)
        ok = (self.family == "flat" and not params) or (
            self.family == "normal"
            and len(params) == 2
            and all(map(math.isfinite, params))
            and params[1] > 0
        )
        if not ok:
            raise InputError(
                f"bad mu prior {self.family}:{params}; use {_MU_FORMS} with SD > 0",
                field="mu_prior",
            )
        object.__setattr__(self, "params", params)

    @classmethod
    def parse(cls, text: str) -> MuPrior:
        """Read 'flat' or 'normal:0,10'."""
        family, _, rest = str(text).strip().partition(":")
        family = family.strip().lower()
        if family == "flat" and not rest.strip():
            return cls()
        try:
            params = tuple(float(p) for p in rest.split(",")) if rest.strip() else ()
        except ValueError:
            raise InputError(
                f"cannot read mu prior {text!r}; use {_MU_FORMS}", field="mu_prior"
            ) from None
        return cls(family, params)

    def describe(self) -> str:
        return (
            "flat" if self.family == "flat" else "normal:" + ",".join(f"{p:g}" for p in self.params)
        )

    def logpdf(self, mu: Any) -> Any:
        if self.family == "flat":
            return np.zeros_like(np.asarray(mu, dtype=float))
        return stats.norm.logpdf(mu, *self.params)


# --------------------------------------------------------------------------------------
# sums of Gaussian kernels (the posterior and predictive distributions)


class _KernelSum:
    """sum_c W_c K_c(x): Gaussian kernels of sd `smooth`, sharpened to sd `width` <= smooth.

    See the module docstring for the series. Kernels with width == smooth are plain normals.
    The smallest weights, together below `_PRUNE` of the total, are dropped. Sharpened kernels
    that share a centre and a smoothing sd are merged exactly, since the series is linear in
    its coefficients: sum_c W_c (-gamma_c)^n / n! becomes one coefficient per n.
    """

    def __init__(self, loc: Any, weight: Any, width: Any, smooth: Any) -> None:
        loc, weight, width, smooth = np.broadcast_arrays(
            *(np.asarray(a, dtype=float).ravel() for a in (loc, weight, width, smooth))
        )
        order = np.argsort(weight)
        dropped = np.cumsum(weight[order]) < _PRUNE * weight.sum()
        keep = np.sort(order[~dropped])
        loc, width, smooth = loc[keep], width[keep], smooth[keep]
        weight = weight[keep] / weight[keep].sum()
        self._mean = float(weight @ loc)
        self._var = float(weight @ ((loc - self._mean) ** 2 + width**2))
        gamma = (smooth**2 - width**2) / (2 * smooth**2)
        sharp = gamma > 1e-14
        self.lower = float(np.min(loc - 12 * smooth))
        self.upper = float(np.max(loc + 12 * smooth))
        self.loc, self.smooth, self.weight = loc[~sharp], smooth[~sharp], weight[~sharp]
        # coeff[n - 1] = W (-gamma)^n / n! for n = 1..N, then summed over merged kernels
        g = gamma[sharp]
        coeff = np.empty((_DECONV_TERMS + 1, g.size))
        coeff[0] = weight[sharp]
        for n in range(1, _DECONV_TERMS + 1):
            coeff[n] = coeff[n - 1] * (-g) / n
        keys, inverse = np.unique(
            np.stack([loc[sharp], smooth[sharp]]), axis=1, return_inverse=True
        )
        merged = np.zeros((_DECONV_TERMS + 1, keys.shape[1]))
        for n in range(_DECONV_TERMS + 1):
            merged[n] = np.bincount(inverse.ravel(), weights=coeff[n], minlength=keys.shape[1])
        self.sharp_loc, self.sharp_smooth = keys
        self.sharp_weight = merged[0]
        self.coeff = merged[1:]

    def mean(self) -> float:
        return self._mean

    def var(self) -> float:
        return self._var

    def _evaluate(self, x: Any, want_cdf: bool, want_pdf: bool) -> tuple[Any, Any]:
        x = np.atleast_1d(np.asarray(x, dtype=float))
        cdf = np.zeros(x.size) if want_cdf else None
        pdf = np.zeros(x.size) if want_pdf else None
        size = max(1, self.loc.size + (2 * _DECONV_TERMS + 2) * self.sharp_loc.size)
        step = max(1, _CHUNK // size)
        for start in range(0, x.size, step):
            xs = x[start : start + step, None]
            part = slice(start, start + step)
            if self.loc.size:
                z = (xs - self.loc) / self.smooth
                if want_cdf:
                    cdf[part] += special.ndtr(z) @ self.weight
                if want_pdf:
                    pdf[part] += (np.exp(-0.5 * z * z) / self.smooth) @ self.weight / _SQRT2PI
            if self.sharp_loc.size:
                z = (xs - self.sharp_loc) / self.sharp_smooth
                phi = np.exp(-0.5 * z * z) / _SQRT2PI
                # He_0 = 1, He_1 = z, He_{m+1} = z He_m - m He_{m-1}
                h_prev, h = np.ones_like(z), z
                odd = np.zeros_like(z)
                even = np.zeros_like(z)
                for m in range(1, 2 * _DECONV_TERMS + 1):
                    if m % 2:
                        odd += self.coeff[(m - 1) // 2] * h
                    else:
                        even += self.coeff[m // 2 - 1] * h
                    h_prev, h = h, z * h - m * h_prev
                if want_cdf:
                    cdf[part] += special.ndtr(z) @ self.sharp_weight - (phi * odd).sum(axis=1)
                if want_pdf:
                    pdf[part] += ((phi / self.sharp_smooth) * (self.sharp_weight + even)).sum(
                        axis=1
                    )
        return cdf, pdf

    def cdf(self, x: Any) -> np.ndarray:
        return np.clip(self._evaluate(x, True, False)[0], 0.0, 1.0)

    def pdf(self, x: Any) -> np.ndarray:
        return np.maximum(self._evaluate(x, False, True)[1], 0.0)

    def ppf(self, levels: Sequence[float]) -> np.ndarray:
        """Quantiles by safeguarded Newton steps on all levels at once."""
        q = np.asarray(levels, dtype=float)
        lo = np.full(q.size, self.lower)
        hi = np.full(q.size, self.upper)
        sd = math.sqrt(max(self.var(), 1e-300))
        x = np.clip(self.mean() + sd * special.ndtri(q), lo, hi)
        tol = 1e-12 * max(1.0, sd) + 1e-13 * float(np.max(np.abs(hi)))
        for _ in range(200):
            f, dens = self._evaluate(x, True, True)
            below = f < q
            lo = np.where(below, x, lo)
            hi = np.where(below, hi, x)
            with np.errstate(divide="ignore", invalid="ignore"):
                newton = x - (f - q) / dens
            inside = (newton > lo) & (newton < hi) & np.isfinite(newton)
            new = np.where(inside, newton, 0.5 * (lo + hi))
            done = np.abs(new - x) < tol
            x = new
            if done.all():
                return x
        raise NumericalError(
            "the quantiles of a posterior did not converge; try refine=2 or a tighter tau prior"
        )


# --------------------------------------------------------------------------------------
# results


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
    _dist: _KernelSum = field(repr=False, compare=False)

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
    accuracy: the absolute bound on the predictive quantiles' integration error.
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
            "notes": list(self.notes),
        }


# --------------------------------------------------------------------------------------
# input checks


def _array(name: str, values: Any, k: int | None = None) -> np.ndarray:
    arr = np.asarray(values, dtype=float).ravel()
    if arr.size == 0 or (k is not None and arr.size != k):
        raise InputError(
            f"{name} needs {k if k is not None else 'at least one'} value(s), got {arr.size}",
            field=name,
        )
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must be finite numbers", field=name)
    return arr


@dataclass(frozen=True)
class _Discount:
    power: np.ndarray
    shift: np.ndarray
    var: np.ndarray
    notes: tuple[str, ...]


def _discount(k: int, power: Any, bias_shift: Any, bias_var: Any) -> _Discount:
    notes = []
    a = np.ones(k) if power is None else _array("power", power, k)
    if np.any((a <= 0) | (a > 1)):
        raise InputError("power weights must be in (0, 1]", field="power")
    if power is not None:
        notes.append("each study's likelihood raised to its power weight (Ibrahim & Chen 2000)")
    b = np.zeros(k) if bias_shift is None else _array("bias_shift", bias_shift, k)
    v = np.zeros(k) if bias_var is None else _array("bias_var", bias_var, k)
    if np.any(v < 0):
        raise InputError("bias variances must be >= 0", field="bias_var")
    if bias_shift is not None or bias_var is not None:
        notes.append("additive study biases N(b_i, v_i) applied (Turner et al. 2009)")
    return _Discount(a, b, v, tuple(notes))


def _priors(tau_prior: TauPrior | str, mu_prior: MuPrior | str | None) -> tuple[TauPrior, MuPrior]:
    tp = tau_prior if isinstance(tau_prior, TauPrior) else TauPrior.parse(tau_prior)
    if mu_prior is None:
        mp = MuPrior()
    else:
        mp = mu_prior if isinstance(mu_prior, MuPrior) else MuPrior.parse(mu_prior)
    return tp, mp


def _check_refine(refine: float) -> float:
    if not (math.isfinite(refine) and 1 <= refine <= 8):
        raise InputError(f"refine must be between 1 and 8, got {refine}", field="refine")
    return float(refine)


# --------------------------------------------------------------------------------------
# the log-tau grid


def _locate(
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


def _log_tau_nodes(lo: float, hi: float, sd: float, refine: float) -> tuple[np.ndarray, float]:
    step = min(_MAX_LOG_TAU_STEP, _SPACING * sd) / refine
    n = math.ceil((hi - lo) / step) + 1
    return lo + step * np.arange(n), step


# --------------------------------------------------------------------------------------
# normal model


def _normal_conditional(
    y: np.ndarray, var: np.ndarray, tau2: np.ndarray, mu_prior: MuPrior
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """log p(y | tau) + const, and mu | tau, y ~ N(m, 1/W), for each tau² (closed form)."""
    v = var[None, :] + tau2[:, None]
    w = 1.0 / v
    big_w = w.sum(axis=1)
    wy = w @ y
    sum_log_v = np.log(v).sum(axis=1)
    if mu_prior.family == "normal":
        m0, s0 = mu_prior.params
        big_w = big_w + 1 / s0**2
        wy = wy + m0 / s0**2
    m = wy / big_w
    resid = w @ (y * y) - 2 * m * wy + m * m * w.sum(axis=1)
    if mu_prior.family == "normal":
        resid = resid + (m0 * m0 - 2 * m * m0 + m * m) / s0**2
    log_marg = -0.5 * sum_log_v - 0.5 * np.log(big_w) - 0.5 * resid
    return log_marg, m, 1.0 / big_w


def _tau_search_range(tau_prior: TauPrior, y: np.ndarray, var: np.ndarray) -> tuple[float, float]:
    lo, hi = tau_prior.log_tau_range()
    spread = float(np.ptp(y) + math.sqrt(var.max()))
    return (min(lo, math.log(math.sqrt(var.min())) - _CUTOFF), max(hi, math.log(spread) + 5.0))


@dataclass(frozen=True)
class _Posterior:
    """The integration result common to all models, before it becomes a BayesResult."""

    mu: _KernelSum
    u: _KernelSum
    tau2_mean: float
    predictive: _KernelSum


def _tau_summary(u: np.ndarray, weight: np.ndarray, step: float) -> _KernelSum:
    return _KernelSum(u, weight, np.zeros(u.size), np.full(u.size, 1.5 * step))


def _integrate_normal(
    y: np.ndarray, var: np.ndarray, tau_prior: TauPrior, mu_prior: MuPrior, refine: float
) -> _Posterior:
    cutoff = _CUTOFF + 8 * math.log2(refine)

    def log_post(u: np.ndarray) -> np.ndarray:
        return (
            _normal_conditional(y, var, np.exp(2 * u), mu_prior)[0]
            + tau_prior.logpdf(np.exp(u))
            + u
        )

    lo, hi, sd = _locate(log_post, *_tau_search_range(tau_prior, y, var), cutoff)
    u, step = _log_tau_nodes(lo, hi, sd, refine)
    tau2 = np.exp(2 * u)
    log_marg, m, v = _normal_conditional(y, var, tau2, mu_prior)
    lp = log_marg + tau_prior.logpdf(np.exp(u)) + u
    w = np.exp(lp - lp.max())
    w /= w.sum()
    sd_mu = np.sqrt(v)
    return _Posterior(
        mu=_KernelSum(m, w, sd_mu, sd_mu),
        u=_tau_summary(u, w, step),
        tau2_mean=float(w @ tau2),
        predictive=_KernelSum(m, w, np.sqrt(v + tau2), np.sqrt(v + tau2)),
    )


# --------------------------------------------------------------------------------------
# count models


@dataclass(frozen=True)
class _CountLikelihood:
    """Per-study log-likelihood in the latent parameter theta, up to a constant, times a_i.

    binomial-logit: a (y theta - n log(1 + e^theta)); Poisson-log with exposure E:
    a (y theta - E e^theta). Both are concave in theta.
    """

    kind: str
    events: np.ndarray
    size: np.ndarray  # totals (binomial) or exposures (Poisson)
    power: np.ndarray

    def loglik(self, theta: np.ndarray) -> np.ndarray:
        """theta has shape (..., k, q): q Gauss-Hermite points per study."""
        y, n, a = self.events[:, None], self.size[:, None], self.power[:, None]
        if self.kind == "binomial":
            # log(1 + e^t), exact in double precision below t = 700 (the nodes lie near data)
            capped = np.minimum(theta, 700.0)
            return a * (y * theta - n * (np.log1p(np.exp(capped)) + (theta - capped)))
        return a * (y * theta - n * np.exp(theta))

    def derivatives(self, theta: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if self.kind == "binomial":
            p = special.expit(theta)
            return (
                self.power * (self.events - self.size * p),
                -self.power * self.size * p * (1 - p),
            )
        rate = self.size * np.exp(theta)
        return self.power * (self.events - rate), -self.power * rate

    def normal_approx(self) -> tuple[np.ndarray, np.ndarray]:
        """y, se with the 0.5 correction on every study (common practice)."""
        e = self.events + 0.5
        if self.kind == "binomial":
            f = self.size - self.events + 0.5
            return np.log(e / f), np.sqrt(1 / e + 1 / f)
        return np.log(e / self.size), np.sqrt(1 / e)


@dataclass(frozen=True)
class _StudyGroup:
    """Studies integrated with one Gauss-Hermite order, with their bias terms and the
    normal-approximation start for Newton's method."""

    lik: _CountLikelihood
    shift: np.ndarray
    var: np.ndarray
    nodes: np.ndarray
    weights: np.ndarray
    start: np.ndarray
    start_prec: np.ndarray


def _quadrature_groups(lik: _CountLikelihood, d: _Discount, refine: float) -> list[_StudyGroup]:
    """Split the studies by Gauss-Hermite order: the further a study's likelihood is from
    normal (fewer events, or fewer non-events), the more nodes (orders chosen by measuring
    the error against 80-node rules over tau up to 5)."""
    information = (
        lik.events if lik.kind == "poisson" else np.minimum(lik.events, lik.size - lik.events)
    )
    order = np.select([information >= 50, information >= 10], [8, 12], _GH_NODES)
    y0, se0 = lik.normal_approx()
    groups = []
    for q in np.unique(order):
        idx = np.flatnonzero(order == q)
        nodes, weights = np.polynomial.hermite.hermgauss(round(q * refine))
        part = _CountLikelihood(lik.kind, lik.events[idx], lik.size[idx], lik.power[idx])
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
    lik: _CountLikelihood,
    d: _Discount,
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
            per_chunk = max(1, _CHUNK // (n * lik.events.size * _GH_NODES))
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
    lik: _CountLikelihood, d: _Discount, tau_prior: TauPrior, mu_prior: MuPrior, refine: float
) -> _Posterior:
    cutoff = _CUTOFF + 8 * math.log2(refine)
    y0, se0 = lik.normal_approx()
    var0 = se0**2 / d.power + d.var
    y0 = y0 - d.shift

    def approx_log_post(uu: np.ndarray) -> np.ndarray:
        return (
            _normal_conditional(y0, var0, np.exp(2 * uu), mu_prior)[0]
            + tau_prior.logpdf(np.exp(uu))
            + uu
        )

    lo, hi, sd_u = _locate(approx_log_post, *_tau_search_range(tau_prior, y0, var0), cutoff)
    # the normal approximation only places the grid; the exact posterior decides its extent
    lo, hi = lo - 2 * sd_u, hi + 2 * sd_u
    for _ in range(6):
        u, step = _log_tau_nodes(lo, hi, sd_u, refine)
        _, m0, v0 = _normal_conditional(y0, var0, np.exp(2 * u), mu_prior)
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
        fine = step <= 1.25 * min(_MAX_LOG_TAU_STEP, _SPACING * exact_sd) / refine
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
    return _Posterior(
        mu=_KernelSum(grid.mu, w, 0.0, smooth),
        u=_tau_summary(u, wu, step),
        tau2_mean=float(wu @ tau**2),
        predictive=_KernelSum(grid.mu, w, width_p, np.maximum(width_p, smooth)),
    )


# --------------------------------------------------------------------------------------
# assembling the result


def _result(
    post: _Posterior,
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
    return BayesResult(
        k=k,
        likelihood=likelihood,
        scale=scale,
        mu=post.mu.mean(),
        se=math.sqrt(post.mu.var()),
        ci=(float(mu_lo), float(mu_hi)),
        tau=float(math.exp(u_q[1])),
        tau2=post.tau2_mean,
        tau_ci=(float(math.exp(u_q[0])), float(math.exp(u_q[2]))),
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
        notes=tuple(notes),
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
    y = _array("y", y)
    se = _array("se", se, y.size)
    if np.any(se <= 0):
        raise InputError("standard errors must be positive", field="se")
    if scale not in SCALES:
        raise InputError(f"unknown scale {scale!r}; one of {', '.join(SCALES)}", field="scale")
    tp, mp = _priors(tau_prior, mu_prior)
    d = _discount(y.size, power, bias_shift, bias_var)
    post = _integrate_normal(y - d.shift, se**2 / d.power + d.var, tp, mp, _check_refine(refine))
    return _result(
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


def _fit_counts(
    kind: str,
    events: Any,
    size: Any,
    size_name: str,
    tau_prior: TauPrior | str,
    mu_prior: MuPrior | str | None,
    power: Any,
    bias_shift: Any,
    bias_var: Any,
    refine: float,
) -> BayesResult:
    y = _array("events", events)
    n = _array(size_name, size, y.size)
    if np.any(y < 0) or np.any(y != np.round(y)):
        raise InputError("events must be whole numbers >= 0", field="events")
    if kind == "binomial" and (np.any(n != np.round(n)) or np.any(n < 1) or np.any(y > n)):
        raise InputError("totals must be whole numbers >= 1 and >= events", field=size_name)
    if kind == "poisson" and np.any(n <= 0):
        raise InputError("exposures must be positive", field=size_name)
    tp, mp = _priors(tau_prior, mu_prior)
    if mp.family == "flat":
        # with a flat mu prior the posterior is proper only if the likelihood of mu vanishes
        # in both directions, which needs data away from the boundary
        interior = (y > 0) & (y < n) if kind == "binomial" else y > 0
        both_ends = kind == "binomial" and np.any(y == 0) and np.any(y == n)
        if not (interior.any() or both_ends):
            raise InputError(
                "with these counts a flat mu prior gives an improper posterior; "
                "give a normal mu prior such as normal:0,10",
                field="mu_prior",
            )
    d = _discount(y.size, power, bias_shift, bias_var)
    lik = _CountLikelihood(kind, y, n, d.power)
    post = _integrate_counts(lik, d, tp, mp, _check_refine(refine))
    y_approx, se_approx = lik.normal_approx()
    return _result(
        post,
        k=y.size,
        likelihood=kind,
        scale="logit" if kind == "binomial" else "log",
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
    *,
    power: Any = None,
    bias_shift: Any = None,
    bias_var: Any = None,
    refine: float = 1.0,
) -> BayesResult:
    """Binomial-logit hierarchical model for single-arm proportions events_i / totals_i.

    y_i ~ Bin(n_i, expit(theta_i)), theta_i ~ N(mu + b_i, tau² + v_i); the likelihood is exact
    (each theta_i integrated by adaptive Gauss-Hermite), raised to a_i when `power` is given.
    Results are on the logit scale.
    """
    return _fit_counts(
        "binomial",
        events,
        totals,
        "totals",
        tau_prior,
        mu_prior,
        power,
        bias_shift,
        bias_var,
        refine,
    )


def fit_poisson(
    events: Any,
    exposures: Any,
    tau_prior: TauPrior | str,
    mu_prior: MuPrior | str | None = None,
    *,
    power: Any = None,
    bias_shift: Any = None,
    bias_var: Any = None,
    refine: float = 1.0,
) -> BayesResult:
    """Poisson-log hierarchical model for event counts y_i over exposures E_i.

    y_i ~ Poisson(E_i exp(theta_i)), theta_i ~ N(mu + b_i, tau² + v_i); the likelihood is
    exact, raised to a_i when `power` is given. Results are on the log-rate scale.
    """
    return _fit_counts(
        "poisson",
        events,
        exposures,
        "exposures",
        tau_prior,
        mu_prior,
        power,
        bias_shift,
        bias_var,
        refine,
    )
