"""Priors on the hyperparameters of the hierarchical model: tau (between-study sd) and mu.

tau ~ half-normal, half-t (Gelman 2006, Bayesian Anal 1:515) or log-normal, always proper
(Spiegelhalter, Abrams & Myles 2004, *Bayesian Approaches to Clinical Trials and Health-Care
Evaluation*, ch. 5); mu ~ flat (improper) or normal.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from registry.errors import InputError

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

    def log_tau_range(self, cutoff: float) -> tuple[float, float]:
        """An interval of log tau holding all but ~exp(-cutoff) of the prior's mass."""
        if self.family == "log-normal":
            m, sigma = self.params
            half = math.sqrt(2 * cutoff) * sigma
            return m - half, m + half
        s = self.params[0]
        # below s e^-cutoff the mass is ~ e^-C (density bounded at 0); above, the tails decay like
        # exp(-tau²/2s²) or (tau/s)^-df.
        upper = (
            math.log(math.sqrt(2 * cutoff))
            if self.family == "half-normal"
            else cutoff / self.params[1] + 1.0
        )
        return math.log(s) - cutoff, math.log(s) + upper


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

    @property
    def is_flat(self) -> bool:
        """The improper uniform prior (no parameters), as opposed to N(mean, sd²)."""
        return not self.params

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


def resolve_priors(
    tau_prior: TauPrior | str, mu_prior: MuPrior | str | None
) -> tuple[TauPrior, MuPrior]:
    """The priors as objects, parsing text forms; mu defaults to flat."""
    tp = tau_prior if isinstance(tau_prior, TauPrior) else TauPrior.parse(tau_prior)
    if mu_prior is None:
        mp = MuPrior()
    else:
        mp = mu_prior if isinstance(mu_prior, MuPrior) else MuPrior.parse(mu_prior)
    return tp, mp
