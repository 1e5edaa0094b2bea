"""PyMC: lines that run inside ``with pm.Model():`` after ``import pymc as pm``.

Parameterisations (PyMC API documentation, recalled from memory): Normal(mu, sigma) and
StudentT(nu, mu, sigma) take standard deviations / scales; LogNormal(mu, sigma) takes the
mean and sd of the log, mu = log(scipy scale); Beta(alpha, beta); Gamma(alpha, beta) takes
shape and rate, beta = 1 / scipy scale. A mixture is one ``pm.Mixture`` variable with its
weights and component distributions.
"""

from __future__ import annotations

import math

from registry.emit.common import (
    Forms,
    arguments,
    comment_block,
    has_natural,
    header,
    keywords,
    literal,
)
from registry.emit.names import natural_name
from registry.values.prior import Component, Prior

FORMS: Forms = {
    "normal": ("pm.Normal", lambda p: {"mu": p["loc"], "sigma": p["scale"]}),
    "student_t": ("pm.StudentT", lambda p: {"nu": p["df"], "mu": p["loc"], "sigma": p["scale"]}),
    "lognormal": ("pm.LogNormal", lambda p: {"mu": math.log(p["scale"]), "sigma": p["s"]}),
    "beta": ("pm.Beta", lambda p: {"alpha": p["a"], "beta": p["b"]}),
    "gamma": ("pm.Gamma", lambda p: {"alpha": p["a"], "beta": 1.0 / p["scale"]}),
}

_NATURAL = {"log": "pm.math.exp", "logit": "pm.math.invlogit", "fisher_z": "pm.math.tanh"}


def _component(c: Component) -> str:
    function, args = arguments(FORMS, c)
    return f"{function}.dist({keywords(args)})"


def render(prior: Prior, name: str) -> str:
    natural = natural_name(name, prior.scale, "pymc") if has_natural(prior) else None
    lines = comment_block(header(prior, "PyMC (inside with pm.Model():)", name, natural), "#")
    if not prior.is_mixture:
        function, args = arguments(FORMS, prior.components[0])
        lines.append(f'{name} = {function}("{name}", {keywords(args)})')
    else:
        weights = ", ".join(literal(c.weight) for c in prior.components)
        lines += [
            f"{name} = pm.Mixture(",
            f'    "{name}",',
            f"    w=[{weights}],",
            "    comp_dists=[",
            *(f"        {_component(c)}," for c in prior.components),
            "    ],",
            ")",
        ]
    if natural is not None:
        lines.append(f'{natural} = pm.Deterministic("{natural}", {_NATURAL[prior.scale]}({name}))')
    return "\n".join(lines) + "\n"
