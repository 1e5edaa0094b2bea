"""Numerical integration over prior components on their canonical coordinate.

Every family's canonical coordinate phi (x, log x or logit x; `registry.values.families`) is
the measure's analysis scale, on which each likelihood is written:

- binomial: log C(n, x) + x log expit(phi) + (n - x) log expit(-phi);
- Poisson: x (phi + log E) - E e^phi - log x!;
- normal: log N(y; phi, se²).

Integrals use the trapezoid rule on a grid that is dense where each component has mass (phi at
the normal scores -Z..Z of each component's quantile function, so Student-t tails are reached)
and, for an observed study, around its likelihood (its centre +- 12 of its widths). The same
integral on a grid of twice the points gives the accuracy that results report (the change on
halving the spacing, common practice for the trapezoid rule).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from registry.checks.study import Study
from registry.values.families import Family

# normal scores of the quantile grid: tail mass beyond is about 3e-14 on each side
Z_SPAN = 7.5
LIKELIHOOD_SPAN = 12.0
POINTS = 600


def log_likelihood(study: Study, phi: Any) -> Any:
    """log p(result | phi) in full (constants kept, so that components of different
    families can be compared)."""
    import numpy as np

    return study.observation.log_likelihood(study.result, study.size, np.asarray(phi, dtype=float))


def likelihood_window(study: Study) -> tuple[float, float]:
    """Centre and width of the likelihood in phi (its maximum, and 1/sqrt(information) there,
    with half an event added so that zero counts have a finite window)."""
    return study.observation.window(study.result, study.size)


def quantile_points(dist: Family, points: int) -> Any:
    import numpy as np
    from scipy import special

    u = special.ndtr(np.linspace(-Z_SPAN, Z_SPAN, points))
    phi = np.array([dist.canonical_ppf(float(v)) for v in u])
    return phi[np.isfinite(phi)]


@dataclass(frozen=True)
class Grid:
    """Points phi and the log of their trapezoid weights."""

    phi: Any = field(repr=False)
    log_w: Any = field(repr=False)

    @classmethod
    def around(cls, dists: list[Family], study: Study | None, points: int = POINTS) -> Grid:
        import numpy as np

        parts = [quantile_points(d, points) for d in dists]
        if study is not None and study.result is not None:
            centre, width = likelihood_window(study)
            parts.append(centre + width * np.linspace(-LIKELIHOOD_SPAN, LIKELIHOOD_SPAN, points))
        phi = np.unique(np.concatenate(parts))
        gaps = np.diff(phi)
        w = np.zeros_like(phi)
        w[:-1] += gaps / 2
        w[1:] += gaps / 2
        return cls(phi, np.log(np.maximum(w, 1e-300)))

    def log_density(self, dist: Family) -> Any:
        """log p(phi), normalised on this grid (so that quadrature error in the total mass does
        not become a bias)."""
        from scipy.special import logsumexp

        lp = dist.canonical_terms(self.phi)[0]
        return lp - logsumexp(lp + self.log_w)

    def probabilities(self, log_density: Any) -> Any:
        """The mass each point carries (sums to 1)."""
        import numpy as np
        from scipy.special import logsumexp

        v = log_density + self.log_w
        return np.exp(v - logsumexp(v))

    def quantile(self, log_density: Any, q: float) -> float:
        """phi at cumulative mass q, by the cumulative trapezoid rule and linear interpolation."""
        import numpy as np

        dens = np.exp(log_density - log_density.max())
        cum = np.concatenate([[0.0], np.cumsum((dens[1:] + dens[:-1]) / 2 * np.diff(self.phi))])
        return float(np.interp(q * cum[-1], cum, self.phi))
