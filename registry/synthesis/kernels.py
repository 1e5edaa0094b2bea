"""Sums of Gaussian kernels: the posterior and predictive distributions as smooth functions.

Distribution functions of point-mass sums (mu and tau in the count models, and the predictive
where tau is small beside the mu grid) are made smooth without bias: each node is given a
Gaussian kernel of sd s = 1.5 x spacing, and the added variance is removed exactly up to
truncation by the backward heat series exp(-c D²/2) (c = s² - width²); in terms of Hermite
polynomials (Mehler's identity, recalled), per node with z = (x - loc)/s and gamma = c / (2 s²):
    F(x) = Phi(z) - phi(z) sum_{n>=1} (-gamma)^n / n! He_{2n-1}(z),
    f(x) = phi(z)/s [1 + sum_{n>=1} (-gamma)^n / n! He_{2n}(z)].
The series reproduces the target sd exactly (its n = 1 term alone does so for the variance).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
from scipy import special

from registry.errors import NumericalError

_DECONV_TERMS = 10
# Points x kernels evaluated at once, to bound memory.
CHUNK = 2_000_000
_PRUNE = 1e-13
_SQRT2PI = math.sqrt(2 * math.pi)


class KernelSum:
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
        step = max(1, CHUNK // size)
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
