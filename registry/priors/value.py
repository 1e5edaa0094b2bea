"""A built prior as an immutable value: its components, scale and where it came from.

Emitters, reports and checks read this value and nothing else. Parameters use scipy's names
so that `Component.frozen()` is the reference distribution for every family.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from registry.errors import InputError

# family -> (scipy.stats name, parameter names in scipy's order, support)
FAMILIES: dict[str, tuple[str, tuple[str, ...], str]] = {
    "normal": ("norm", ("loc", "scale"), "real"),
    "student_t": ("t", ("df", "loc", "scale"), "real"),
    "lognormal": ("lognorm", ("s", "scale"), "positive"),
    "beta": ("beta", ("a", "b"), "unit"),
    "gamma": ("gamma", ("a", "scale"), "positive"),
}

# What a value on each scale means; the natural scale is reached by `registry.evidence.scales`.
SCALES = ("identity", "log", "logit", "fisher_z", "probability", "rate")


@dataclass(frozen=True)
class Component:
    """One component of a (possibly one-component) mixture prior."""

    family: str
    params: Mapping[str, float]
    weight: float = 1.0

    def __post_init__(self) -> None:
        if self.family not in FAMILIES:
            raise InputError(f"unknown family {self.family!r}", field="family")
        names = FAMILIES[self.family][1]
        if set(self.params) != set(names):
            raise InputError(
                f"{self.family} takes parameters {', '.join(names)}, got {', '.join(self.params)}",
                field="params",
            )
        for key in names:
            value = self.params[key]
            if not math.isfinite(value) or (key != "loc" and value <= 0):
                raise InputError(
                    f"{self.family} parameter {key} must be finite"
                    f"{'' if key == 'loc' else ' and positive'}, got {value}",
                    field=key,
                )
        if not 0 < self.weight <= 1:
            raise InputError(
                f"a component weight must be in (0, 1], got {self.weight}", field="weight"
            )
        # A canonical, ordered mapping keeps equality and the digest independent of key order.
        object.__setattr__(self, "params", {k: float(self.params[k]) for k in names})

    @property
    def support(self) -> str:
        return FAMILIES[self.family][2]

    def frozen(self) -> Any:
        """The scipy.stats frozen distribution of this component."""
        from scipy import stats

        scipy_name, names, _ = FAMILIES[self.family]
        return getattr(stats, scipy_name)(**{k: self.params[k] for k in names})

    def to_dict(self) -> dict[str, Any]:
        return {"weight": self.weight, "family": self.family, **self.params}

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> Component:
        family = doc.get("family")
        if family not in FAMILIES:
            raise InputError(f"unknown family {family!r}", field="family")
        return cls(
            family,
            {k: float(doc[k]) for k in FAMILIES[family][1] if k in doc},
            float(doc.get("weight", 1.0)),
        )


@dataclass(frozen=True)
class EntryUse:
    """An entry revision that a prior was built from, and its share of the prior."""

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
    ess: Mapping[str, Any] = field(default_factory=dict)
    entries: tuple[EntryUse, ...] = ()

    def __post_init__(self) -> None:
        if self.scale not in SCALES:
            raise InputError(
                f"unknown scale {self.scale!r}; one of {', '.join(SCALES)}", field="scale"
            )
        if not self.components:
            raise InputError("a prior needs at least one component", field="components")
        if len({c.support for c in self.components}) != 1:
            raise InputError(
                "the components of a mixture must share one support", field="components"
            )
        total = sum(c.weight for c in self.components)
        if abs(total - 1) > 1e-9:
            raise InputError(f"component weights must sum to 1, got {total}", field="weight")

    @property
    def is_mixture(self) -> bool:
        return len(self.components) > 1

    @property
    def label(self) -> str:
        return f"{self.name}@{self.version}"

    def mean(self) -> float:
        return sum(c.weight * float(c.frozen().mean()) for c in self.components)

    def var(self) -> float:
        """Law of total variance: E[Var] + Var[E]."""
        m = self.mean()
        return sum(
            c.weight * (float(c.frozen().var()) + (float(c.frozen().mean()) - m) ** 2)
            for c in self.components
        )

    def cdf(self, x: Any) -> Any:
        return sum(c.weight * c.frozen().cdf(x) for c in self.components)

    def logpdf(self, x: Any) -> Any:
        import numpy as np
        from scipy.special import logsumexp

        terms = [math.log(c.weight) + c.frozen().logpdf(x) for c in self.components]
        return logsumexp(np.stack(terms), axis=0)

    def ppf(self, q: float) -> float:
        """Quantile of the mixture, by root finding on its cdf between component quantiles."""
        if len(self.components) == 1:
            return float(self.components[0].frozen().ppf(q))
        from scipy.optimize import brentq

        lo = min(float(c.frozen().ppf(q)) for c in self.components)
        hi = max(float(c.frozen().ppf(q)) for c in self.components)
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
            out[pick] = c.frozen().rvs(size=int(pick.sum()), random_state=rng)
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
            "ess": dict(self.ess),
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

    def to_stan(self, param: str | None = None) -> str:
        """A complete Stan program with this prior (see `registry.emit`)."""
        from registry.emit import emit

        return emit(self, "stan", param=param)

    def to_jags(self, param: str | None = None) -> str:
        """JAGS statements for inside ``model { }`` (see `registry.emit`)."""
        from registry.emit import emit

        return emit(self, "jags", param=param)

    def to_pymc(self, param: str | None = None) -> str:
        """PyMC lines for inside ``with pm.Model():`` (see `registry.emit`)."""
        from registry.emit import emit

        return emit(self, "pymc", param=param)

    def to_numpyro(self, param: str | None = None) -> str:
        """NumPyro lines for inside a model function (see `registry.emit`)."""
        from registry.emit import emit

        return emit(self, "numpyro", param=param)

    def to_brms(self, param: str | None = None) -> str:
        """A brms-style ``prior(...)`` statement (see `registry.emit`)."""
        from registry.emit import emit

        return emit(self, "brms", param=param)

    def to_json(self) -> str:
        """The versioned JSON document that `registry.emit.load_json` reads back."""
        from registry.emit import emit

        return emit(self, "json")
