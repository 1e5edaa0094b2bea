"""Distribution families as small immutable objects, in the manner of a scipy frozen distribution.

Each family is a frozen dataclass whose fields are its parameters under scipy.stats' names, so
that `frozen()` is the reference distribution and `FAMILIES[name](**params)` rebuilds it from a
stored dictionary. Besides density, cdf, quantile, moments and sampling (delegated to scipy),
each family knows:

- its **support** (real, positive or unit) and the **canonical coordinate** of that support,
  phi = x, log x or logit x, where densities stay finite far into the tails;
- `canonical_terms(phi)`: log p(phi) and its first two derivatives in phi (the density of phi,
  with the Jacobian of the change of variable), written out from the handbook forms because
  scipy's per-call overhead dominates quadrature;
- `canonical_ppf(u)`: the canonical coordinate of the u-quantile;
- `tail_rates()`: how fast the density of phi decays at each end, as the rate c of
  exp(-c |phi|): infinite for faster than any exponential (normal and log-normal on their
  canonical scale, the gamma's right tail), a shape parameter for beta and gamma, 0 for the
  Student-t's polynomial tails;
- where it is conjugate to a likelihood, `update(...)` (the posterior and the log marginal
  likelihood, common practice) and `predictive(...)` (the distribution of a new study's
  result).

Adding a family: a dataclass here with these methods, one entry in `FAMILIES`, and its
parameterisation in each emitter's table (`registry/emit/*.py`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields
from typing import Any, ClassVar

from registry.errors import InputError

# phi = canonical(x) for each support, and back
_CANONICAL = {"real": "identity", "positive": "log", "unit": "logit"}


def to_canonical(support: str, x: Any) -> Any:
    """phi = x (real), log x (positive) or logit x (unit)."""
    import numpy as np
    from scipy import special

    x = np.asarray(x, dtype=float)
    return {"real": lambda v: v, "positive": np.log, "unit": special.logit}[support](x)


def from_canonical(support: str, phi: Any) -> Any:
    import numpy as np
    from scipy import special

    phi = np.asarray(phi, dtype=float)
    return {"real": lambda v: v, "positive": np.exp, "unit": special.expit}[support](phi)


@dataclass(frozen=True)
class Family:
    """Base of the families; subclasses declare their parameters as float fields."""

    name: ClassVar[str]
    scipy_name: ClassVar[str]
    support: ClassVar[str]
    conjugate: ClassVar[str | None] = None  # the likelihood it updates in closed form
    unbounded: ClassVar[frozenset[str]] = frozenset()  # parameters that may be <= 0

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int | float):
                raise InputError(
                    f"{self.name} parameter {f.name} must be a number, got {value!r}",
                    field=f.name,
                )
            value = float(value)
            if not math.isfinite(value) or (f.name not in self.unbounded and value <= 0):
                raise InputError(
                    f"{self.name} parameter {f.name} must be finite"
                    f"{'' if f.name in self.unbounded else ' and positive'}, got {value}",
                    field=f.name,
                )
            object.__setattr__(self, f.name, value)

    @classmethod
    def parameter_names(cls) -> tuple[str, ...]:
        return tuple(f.name for f in fields(cls))

    @property
    def params(self) -> dict[str, float]:
        return {f.name: getattr(self, f.name) for f in fields(self)}

    @property
    def canonical_scale(self) -> str:
        return _CANONICAL[self.support]

    def frozen(self) -> Any:
        """The scipy.stats frozen distribution (the reference for every method below).

        Made once per value and kept: making one costs far more than evaluating it, and a
        mixture's quantiles evaluate each component's cdf thousands of times."""
        made = self.__dict__.get("_frozen")
        if made is None:
            from scipy import stats

            made = getattr(stats, self.scipy_name)(**self.params)
            object.__setattr__(self, "_frozen", made)
        return made

    def logpdf(self, x: Any) -> Any:
        return self.frozen().logpdf(x)

    @classmethod
    def log_densities(cls, params: Any, x: Any) -> Any:
        """(J, G) log densities of J members of the family, given as the rows of `params`
        (in `parameter_names()` order), at G points x, all inside the support.

        By scipy, one distribution at a time; a family overrides it with its closed form,
        vectorised over the members, for EM (scipy's per-call checks dominate there)."""
        return cls._each_by_scipy("logpdf", params, x)

    @classmethod
    def cdfs(cls, params: Any, x: Any) -> Any:
        """(J, G) distribution functions of J members (rows of `params`) at G points x inside
        the support; by scipy unless the family has a closed form (as `log_densities`)."""
        return cls._each_by_scipy("cdf", params, x)

    @classmethod
    def _each_by_scipy(cls, method: str, params: Any, x: Any) -> Any:
        """scipy's `method` (logpdf, cdf) of each member (a row of `params`) at x, stacked."""
        import numpy as np
        from scipy import stats

        dist = getattr(stats, cls.scipy_name)
        names = cls.parameter_names()
        return np.stack(
            [getattr(dist, method)(x, **dict(zip(names, p, strict=True))) for p in params]
        )

    def pdf(self, x: Any) -> Any:
        return self.frozen().pdf(x)

    def cdf(self, x: Any) -> Any:
        return self.frozen().cdf(x)

    def sf(self, x: Any) -> Any:
        return self.frozen().sf(x)

    def ppf(self, q: Any) -> Any:
        return self.frozen().ppf(q)

    def mean(self) -> float:
        return float(self.frozen().mean())

    def var(self) -> float:
        return float(self.frozen().var())

    def rvs(self, size: int, rng: Any) -> Any:
        return self.frozen().rvs(size=size, random_state=rng)

    def canonical_terms(self, phi: Any) -> tuple[Any, Any, Any]:
        raise NotImplementedError

    def canonical_ppf(self, u: float) -> float:
        raise NotImplementedError

    def tail_rates(self) -> tuple[float, float]:
        raise NotImplementedError

    def update(self, first: float, second: float) -> tuple[Family, float]:
        """Posterior and log marginal likelihood after one observation of the conjugate
        likelihood (terms common to every component of a mixture left out)."""
        raise InputError(f"a {self.name} prior has no conjugate update", field="family")

    def predictive(self, size: float) -> Any:
        """The scipy distribution of a new study's result of the given size."""
        raise InputError(f"a {self.name} prior has no closed-form predictive", field="family")


_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


def _member_columns(params: Any) -> tuple[Any, ...]:
    """Each parameter of J members (the rows of `params`) as a (J, 1) column, to broadcast
    against G points."""
    import numpy as np

    table = np.asarray(params, dtype=float)
    return tuple(table[:, i, None] for i in range(table.shape[1]))


def _normal_terms(phi: Any, mu: float, s: float) -> tuple[Any, Any, Any]:
    import numpy as np

    z = (np.asarray(phi, dtype=float) - mu) / s
    return -0.5 * z * z - math.log(s) - _LOG_SQRT_2PI, -z / s, np.full_like(z, -1.0 / s**2)


@dataclass(frozen=True)
class Normal(Family):
    """N(loc, scale²) on the real line; conjugate to a normal likelihood with known se."""

    name: ClassVar[str] = "normal"
    scipy_name: ClassVar[str] = "norm"
    support: ClassVar[str] = "real"
    conjugate: ClassVar[str | None] = "normal"
    unbounded: ClassVar[frozenset[str]] = frozenset({"loc"})
    loc: float
    scale: float

    def mean(self) -> float:
        return self.loc

    def var(self) -> float:
        return self.scale**2

    def canonical_terms(self, phi: Any) -> tuple[Any, Any, Any]:
        return _normal_terms(phi, self.loc, self.scale)

    @classmethod
    def log_densities(cls, params: Any, x: Any) -> Any:
        """-z²/2 - log sqrt(2 pi) - log scale, z = (x - loc)/scale (handbook; scipy's order
        of operations, so the values agree with scipy's to the bit)."""
        import numpy as np

        loc, scale = _member_columns(params)
        z = (np.asarray(x, dtype=float) - loc) / scale
        return -(z**2) / 2.0 - np.log(np.sqrt(2 * np.pi)) - np.log(scale)

    @classmethod
    def cdfs(cls, params: Any, x: Any) -> Any:
        """Phi((x - loc) / scale) (scipy's ndtr)."""
        import numpy as np
        from scipy import special

        loc, scale = _member_columns(params)
        return special.ndtr((np.asarray(x, dtype=float) - loc) / scale)

    def canonical_ppf(self, u: float) -> float:
        from scipy import special

        return self.loc + self.scale * float(special.ndtri(u))

    def tail_rates(self) -> tuple[float, float]:
        return math.inf, math.inf

    def update(self, y: float, se: float) -> tuple[Normal, float]:
        """N(m, s²) and y ~ N(theta, se²): precision P = 1/s² + 1/se², mean (m/s² + y/se²)/P;
        the marginal of y is N(m, s² + se²)."""
        precision = 1.0 / self.scale**2 + 1.0 / se**2
        posterior = Normal((self.loc / self.scale**2 + y / se**2) / precision, precision**-0.5)
        var = self.scale**2 + se**2
        return posterior, -0.5 * (y - self.loc) ** 2 / var - 0.5 * math.log(var) - _LOG_SQRT_2PI

    def predictive(self, se: float) -> Any:
        from scipy import stats

        return stats.norm(self.loc, math.sqrt(self.scale**2 + se**2))


@dataclass(frozen=True)
class StudentT(Family):
    """Student-t with df, loc, scale; the frequentist predictive of Higgins et al. (2009)."""

    name: ClassVar[str] = "student_t"
    scipy_name: ClassVar[str] = "t"
    support: ClassVar[str] = "real"
    unbounded: ClassVar[frozenset[str]] = frozenset({"loc"})
    df: float
    loc: float
    scale: float

    def canonical_terms(self, phi: Any) -> tuple[Any, Any, Any]:
        import numpy as np
        from scipy import special

        nu, s = self.df, self.scale
        d = np.asarray(phi, dtype=float) - self.loc
        denom = nu * s * s + d * d
        log_f = (
            special.gammaln((nu + 1) / 2)
            - special.gammaln(nu / 2)
            - 0.5 * math.log(nu * math.pi)
            - math.log(s)
            - (nu + 1) / 2 * np.log1p(d * d / (nu * s * s))
        )
        return log_f, -(nu + 1) * d / denom, -(nu + 1) * (nu * s * s - d * d) / denom**2

    def canonical_ppf(self, u: float) -> float:
        from scipy import special

        return self.loc + self.scale * float(special.stdtrit(self.df, u))

    def tail_rates(self) -> tuple[float, float]:
        return 0.0, 0.0


@dataclass(frozen=True)
class LogNormal(Family):
    """log x ~ N(log scale, s²) (scipy's lognorm)."""

    name: ClassVar[str] = "lognormal"
    scipy_name: ClassVar[str] = "lognorm"
    support: ClassVar[str] = "positive"
    s: float
    scale: float

    def canonical_terms(self, phi: Any) -> tuple[Any, Any, Any]:
        return _normal_terms(phi, math.log(self.scale), self.s)

    def canonical_ppf(self, u: float) -> float:
        from scipy import special

        return math.log(self.scale) + self.s * float(special.ndtri(u))

    def tail_rates(self) -> tuple[float, float]:
        return math.inf, math.inf


@dataclass(frozen=True)
class Beta(Family):
    """Beta(a, b) on (0, 1); conjugate to a binomial likelihood."""

    name: ClassVar[str] = "beta"
    scipy_name: ClassVar[str] = "beta"
    support: ClassVar[str] = "unit"
    conjugate: ClassVar[str | None] = "binomial"
    a: float
    b: float

    def mean(self) -> float:
        return self.a / (self.a + self.b)

    def var(self) -> float:
        n = self.a + self.b
        return self.a * self.b / (n * n * (n + 1))

    def canonical_terms(self, phi: Any) -> tuple[Any, Any, Any]:
        """Density of phi = logit x: a phi - (a + b) log(1 + e^phi) - log B(a, b)."""
        import numpy as np
        from scipy import special

        phi = np.asarray(phi, dtype=float)
        a, b = self.a, self.b
        x = special.expit(phi)
        # x (1 - x) as expit(phi) expit(-phi): 1 - x rounds to 0 once phi passes about 37
        return (
            a * phi - (a + b) * np.logaddexp(0.0, phi) - special.betaln(a, b),
            a - (a + b) * x,
            -(a + b) * x * special.expit(-phi),
        )

    def canonical_ppf(self, u: float) -> float:
        from scipy import special

        return float(special.logit(special.betaincinv(self.a, self.b, u)))

    @classmethod
    def log_densities(cls, params: Any, x: Any) -> Any:
        """(b - 1) log(1 - x) + (a - 1) log x - log B(a, b) (handbook; scipy's order of
        operations)."""
        import numpy as np
        from scipy import special

        a, b = _member_columns(params)
        x = np.asarray(x, dtype=float)
        return special.xlog1py(b - 1.0, -x) + special.xlogy(a - 1.0, x) - special.betaln(a, b)

    @classmethod
    def cdfs(cls, params: Any, x: Any) -> Any:
        """The regularised incomplete beta function I_x(a, b)."""
        import numpy as np
        from scipy import special

        a, b = _member_columns(params)
        return special.betainc(a, b, np.asarray(x, dtype=float))

    def tail_rates(self) -> tuple[float, float]:
        return self.a, self.b

    def update(self, events: float, n: float) -> tuple[Beta, float]:
        """Beta(a + x, b + n - x); marginal B(a + x, b + n - x) / B(a, b) (beta-binomial,
        without the binomial coefficient)."""
        from scipy import special

        posterior = Beta(self.a + events, self.b + n - events)
        return posterior, float(
            special.betaln(posterior.a, posterior.b) - special.betaln(self.a, self.b)
        )

    def predictive(self, n: float) -> Any:
        from scipy import stats

        return stats.betabinom(int(n), self.a, self.b)


@dataclass(frozen=True)
class Gamma(Family):
    """Gamma with shape a and scale (rate = 1/scale) on (0, inf); conjugate to Poisson counts."""

    name: ClassVar[str] = "gamma"
    scipy_name: ClassVar[str] = "gamma"
    support: ClassVar[str] = "positive"
    conjugate: ClassVar[str | None] = "poisson"
    a: float
    scale: float

    @property
    def rate(self) -> float:
        return 1.0 / self.scale

    def mean(self) -> float:
        return self.a * self.scale

    def var(self) -> float:
        return self.a * self.scale**2

    def canonical_terms(self, phi: Any) -> tuple[Any, Any, Any]:
        """Density of phi = log x: a phi - e^phi / scale - log Gamma(a) - a log scale."""
        import numpy as np
        from scipy import special

        phi = np.asarray(phi, dtype=float)
        lam = np.exp(phi)
        return (
            self.a * phi
            - lam / self.scale
            - special.gammaln(self.a)
            - self.a * math.log(self.scale),
            self.a - lam / self.scale,
            -lam / self.scale,
        )

    def canonical_ppf(self, u: float) -> float:
        from scipy import special

        return math.log(float(special.gammaincinv(self.a, u)) * self.scale)

    @classmethod
    def log_densities(cls, params: Any, x: Any) -> Any:
        """(a - 1) log z - z - log Gamma(a) - log scale, z = x / scale (handbook; scipy's
        order of operations)."""
        import numpy as np
        from scipy import special

        a, scale = _member_columns(params)
        z = np.asarray(x, dtype=float) / scale
        return special.xlogy(a - 1.0, z) - z - special.gammaln(a) - np.log(scale)

    @classmethod
    def cdfs(cls, params: Any, x: Any) -> Any:
        """The regularised lower incomplete gamma function P(a, x / scale)."""
        import numpy as np
        from scipy import special

        a, scale = _member_columns(params)
        return special.gammainc(a, np.asarray(x, dtype=float) / scale)

    def tail_rates(self) -> tuple[float, float]:
        return self.a, math.inf

    def update(self, events: float, exposure: float) -> tuple[Gamma, float]:
        """Gamma(a + x, rate b + E); marginal Gamma(a + x)/Gamma(a) b^a / (b + E)^(a + x)
        (negative binomial, without E^x / x!)."""
        from scipy import special

        rate = self.rate
        posterior = Gamma(self.a + events, 1.0 / (rate + exposure))
        return posterior, float(
            special.gammaln(self.a + events)
            - special.gammaln(self.a)
            + self.a * math.log(rate)
            - (self.a + events) * math.log(rate + exposure)
        )

    def predictive(self, exposure: float) -> Any:
        """Negative binomial with n = a and p = b / (b + E) (scipy's nbinom)."""
        from scipy import stats

        return stats.nbinom(self.a, self.rate / (self.rate + exposure))


FAMILIES: dict[str, type[Family]] = {f.name: f for f in (Normal, StudentT, LogNormal, Beta, Gamma)}
NAMES: tuple[str, ...] = tuple(FAMILIES)


def family(name: str) -> type[Family]:
    try:
        return FAMILIES[name]
    except KeyError:
        raise InputError(
            f"unknown family {name!r}; one of {', '.join(NAMES)}", field="family"
        ) from None


def make(name: str, params: Any) -> Family:
    """`FAMILIES[name](**params)`, with a message naming the parameters when they differ."""
    cls = family(name)
    names = cls.parameter_names()
    if set(params) != set(names):
        raise InputError(
            f"{name} takes parameters {', '.join(names)}, got {', '.join(params)}",
            field="params",
        )
    return cls(**{k: params[k] for k in names})


def conjugate_family(likelihood: str) -> type[Family]:
    """The family whose update is closed form under `likelihood`."""
    for cls in FAMILIES.values():
        if cls.conjugate == likelihood:
            return cls
    raise InputError(f"no family is conjugate to a {likelihood} likelihood", field="likelihood")
