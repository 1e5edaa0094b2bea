"""A built prior as an immutable, hashable value: its components, scale and where it came from.

Emitters, reports and checks read this value and nothing else. A component is a family object
(`registry.values.families`, scipy-style parameters) with a weight.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from functools import cached_property
from typing import Any

from registry.errors import InputError
from registry.values.families import Family, make
from registry.values.frozen import FrozenMap, freeze, thaw
from registry.values.scales import PRIOR_SCALES, SUPPORT


@dataclass(frozen=True)
class Component:
    """One component of a (possibly one-component) mixture prior: `weight` x `family(params)`."""

    family: str
    params: Mapping[str, float]
    weight: float = 1.0

    def __post_init__(self) -> None:
        dist = make(self.family, self.params)
        if not (isinstance(self.weight, int | float) and 0 < self.weight <= 1):
            raise InputError(
                f"a component weight must be in (0, 1], got {self.weight}", field="weight"
            )
        # canonical order and floats keep equality, hashing and the digest independent of
        # how the parameters were given
        object.__setattr__(self, "params", FrozenMap(dist.params))
        object.__setattr__(self, "weight", float(self.weight))

    @classmethod
    def of(cls, dist: Family, weight: float = 1.0) -> Component:
        return cls(dist.name, dist.params, weight)

    @cached_property
    def dist(self) -> Family:
        return make(self.family, self.params)

    @property
    def support(self) -> str:
        return self.dist.support

    def reweighted(self, weight: float) -> Component:
        return Component(self.family, self.params, weight)

    def to_dict(self) -> dict[str, Any]:
        return {"weight": self.weight, "family": self.family, **self.params}

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> Component:
        from registry.values.families import family

        cls_ = family(doc.get("family"))
        return cls(
            cls_.name,
            {k: float(doc[k]) for k in cls_.parameter_names() if k in doc},
            float(doc.get("weight", 1.0)),
        )


@dataclass(frozen=True)
class EntryUse:
    """An entry revision that a prior was built from, and its share of the prior's information."""

    id: int
    revision: int
    weight: float

    def to_dict(self) -> dict[str, Any]:
        return {"id": self.id, "revision": self.revision, "weight": self.weight}


@dataclass(frozen=True)
class Prior:
    """An immutable, versioned prior: a finite mixture on one scale, with its lineage.

    The mixture density is p(x) = sum_j w_j f_j(x); its mean and variance follow the laws
    of total expectation and total variance (common practice).
    """

    name: str
    version: int
    digest: str
    scale: str
    components: tuple[Component, ...]
    parameter: str = ""
    quantity: str = ""
    measure: str = ""
    ess: Mapping[str, Any] = field(default_factory=FrozenMap)
    entries: tuple[EntryUse, ...] = ()
    stale: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.scale not in PRIOR_SCALES:
            raise InputError(
                f"unknown scale {self.scale!r}; one of {', '.join(PRIOR_SCALES)}", field="scale"
            )
        components = tuple(self.components)
        if not components:
            raise InputError("a prior needs at least one component", field="components")
        if {c.support for c in components} != {SUPPORT[self.scale]}:
            raise InputError(
                f"a prior on the {self.scale} scale needs {SUPPORT[self.scale]}-valued "
                f"components, got {', '.join(c.family for c in components)}",
                field="components",
            )
        total = math.fsum(c.weight for c in components)
        if abs(total - 1) > 1e-9:
            raise InputError(f"component weights must sum to 1, got {total}", field="weight")
        object.__setattr__(self, "components", components)
        object.__setattr__(self, "entries", tuple(self.entries))
        object.__setattr__(self, "stale", tuple(self.stale))
        object.__setattr__(self, "ess", freeze(dict(self.ess)))

    @classmethod
    def candidate(cls, scale: str, components: tuple[Component, ...]) -> Prior:
        """An unnamed prior, for computing with components before they are stored."""
        return cls("candidate", 0, "", scale, components)

    @property
    def is_mixture(self) -> bool:
        return len(self.components) > 1

    @property
    def support(self) -> str:
        return SUPPORT[self.scale]

    @property
    def label(self) -> str:
        return f"{self.name}@{self.version}"

    def mean(self) -> float:
        return math.fsum(c.weight * c.dist.mean() for c in self.components)

    def var(self) -> float:
        """Law of total variance: E[Var] + Var[E]."""
        m = self.mean()
        return math.fsum(
            c.weight * (c.dist.var() + (c.dist.mean() - m) ** 2) for c in self.components
        )

    def cdf(self, x: Any) -> Any:
        return sum(c.weight * c.dist.cdf(x) for c in self.components)

    def pdf(self, x: Any) -> Any:
        return sum(c.weight * c.dist.pdf(x) for c in self.components)

    def logpdf(self, x: Any) -> Any:
        import numpy as np
        from scipy.special import logsumexp

        terms = [math.log(c.weight) + c.dist.logpdf(x) for c in self.components]
        return logsumexp(np.stack(terms), axis=0)

    def ppf(self, q: float) -> float:
        """Quantile of the mixture, by root finding on its cdf between component quantiles."""
        if len(self.components) == 1:
            return float(self.components[0].dist.ppf(q))
        from scipy.optimize import brentq

        lo = min(float(c.dist.ppf(q)) for c in self.components)
        hi = max(float(c.dist.ppf(q)) for c in self.components)
        if lo == hi:
            return lo
        return float(brentq(lambda x: float(self.cdf(x)) - q, lo, hi, xtol=1e-12))

    def rvs(self, size: int, seed: int) -> Any:
        """Draws by first picking a component, then drawing from it."""
        import numpy as np

        rng = np.random.default_rng(seed)
        which = rng.choice(len(self.components), size=size, p=[c.weight for c in self.components])
        out = np.empty(size)
        for j, c in enumerate(self.components):
            pick = which == j
            out[pick] = c.dist.rvs(int(pick.sum()), rng)
        return out

    def to_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "version": self.version,
            "digest": self.digest,
            "scale": self.scale,
            "parameter": self.parameter,
            "quantity": self.quantity,
            "measure": self.measure,
            "components": [c.to_dict() for c in self.components],
            "ess": thaw(self.ess),
            "entries": [e.to_dict() for e in self.entries],
        }

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> Prior:
        return cls(
            name=doc["name"],
            version=int(doc["version"]),
            digest=doc["digest"],
            scale=doc["scale"],
            components=tuple(Component.from_dict(c) for c in doc["components"]),
            parameter=doc.get("parameter", ""),
            quantity=doc.get("quantity", ""),
            measure=doc.get("measure", ""),
            ess=dict(doc.get("ess", {})),
            entries=tuple(
                EntryUse(int(e["id"]), int(e["revision"]), float(e["weight"]))
                for e in doc.get("entries", [])
            ),
        )
