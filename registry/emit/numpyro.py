"""NumPyro: lines that run inside a model function after ``import numpyro`` and
``import numpyro.distributions as dist``.

Parameterisations (NumPyro API documentation, recalled from memory): Normal(loc, scale) and
StudentT(df, loc, scale) take standard deviations / scales; LogNormal(loc, scale) takes the
mean and sd of the log, loc = log(scipy scale); Beta(concentration1, concentration0) is
beta(a, b); Gamma(concentration, rate), rate = 1 / scipy scale. A mixture is one
``MixtureGeneral`` site over a Categorical on the weights; Categorical needs an array, so a
mixture snippet imports ``jax.numpy`` (a NumPyro dependency) for them.
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
    "normal": ("dist.Normal", lambda p: {"loc": p["loc"], "scale": p["scale"]}),
    "student_t": ("dist.StudentT", lambda p: {"df": p["df"], "loc": p["loc"], "scale": p["scale"]}),
    "lognormal": ("dist.LogNormal", lambda p: {"loc": math.log(p["scale"]), "scale": p["s"]}),
    "beta": ("dist.Beta", lambda p: {"concentration1": p["a"], "concentration0": p["b"]}),
    "gamma": ("dist.Gamma", lambda p: {"concentration": p["a"], "rate": 1.0 / p["scale"]}),
}

_NATURAL = {"log": "ExpTransform", "logit": "SigmoidTransform", "fisher_z": "TanhTransform"}


def _component(c: Component) -> str:
    function, args = arguments(FORMS, c)
    return f"{function}({keywords(args)})"


def render(prior: Prior, name: str) -> str:
    natural = natural_name(name, prior.scale, "numpyro") if has_natural(prior) else None
    lines = comment_block(header(prior, "NumPyro (inside a model function)", name, natural), "#")
    if not prior.is_mixture:
        lines.append(f'{name} = numpyro.sample("{name}", {_component(prior.components[0])})')
    else:
        weights = ", ".join(literal(c.weight) for c in prior.components)
        lines += [
            "import jax.numpy as jnp  # NumPyro's array library, for the mixture weights",
            f"{name} = numpyro.sample(",
            f'    "{name}",',
            "    dist.MixtureGeneral(",
            f"        dist.Categorical(probs=jnp.array([{weights}])),",
            "        [",
            *(f"            {_component(c)}," for c in prior.components),
            "        ],",
            "    ),",
            ")",
        ]
    if natural is not None:
        lines.append(
            f'{natural} = numpyro.deterministic("{natural}", '
            f"dist.transforms.{_NATURAL[prior.scale]}()({name}))"
        )
    return "\n".join(lines) + "\n"
