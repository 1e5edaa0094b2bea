"""JAGS (and BUGS): statements to place inside ``model { }``.

Parameterisations (JAGS User Manual 4.3, recalled from memory): dnorm(mu, tau) and
dt(mu, tau, k) take a precision tau = 1 / sd^2 (1 / scale^2 for t); dlnorm(mu, tau) takes
the mean and precision of the log, so mu = log(scipy scale), tau = 1 / s^2; dbeta(a, b);
dgamma(r, lambda) takes shape and rate, lambda = 1 / scipy scale.

A finite mixture uses a latent component indicator, as in Lunn et al. (2013, *The BUGS
Book*, section 11.6, recalled): ``k ~ dcat(w[])``, one draw per component, and the
parameter is the draw of the chosen component. Drawing every component and selecting one
also allows components of different families, which an indexed single statement cannot.
"""

from __future__ import annotations

import math

from registry.emit.common import (
    Forms,
    arguments,
    comment_block,
    has_natural,
    header,
    literal,
    positional,
)
from registry.emit.names import check_identifier, natural_name
from registry.values.prior import Prior

FORMS: Forms = {
    "normal": ("dnorm", lambda p: {"mu": p["loc"], "tau": p["scale"] ** -2}),
    "student_t": ("dt", lambda p: {"mu": p["loc"], "tau": p["scale"] ** -2, "k": p["df"]}),
    "lognormal": ("dlnorm", lambda p: {"mu": math.log(p["scale"]), "tau": p["s"] ** -2}),
    "beta": ("dbeta", lambda p: {"a": p["a"], "b": p["b"]}),
    "gamma": ("dgamma", lambda p: {"r": p["a"], "lambda": 1.0 / p["scale"]}),
}

_NATURAL = {"log": "exp", "logit": "ilogit", "fisher_z": "tanh"}


def _draw(prior: Prior, index: int, target: str) -> str:
    function, args = arguments(FORMS, prior.components[index])
    return f"{target} ~ {function}({positional(args)})"


def render(prior: Prior, name: str) -> str:
    natural = natural_name(name, prior.scale, "jags") if has_natural(prior) else None
    lines = comment_block(header(prior, "JAGS (inside model { })", name, natural), "#")
    if not prior.is_mixture:
        lines.append(_draw(prior, 0, name))
    else:
        weight, component, draw = (
            check_identifier(f"{name[:52]}_{part}", "jags")
            for part in ("weight", "component", "draw")
        )
        lines.append(f"# mixture: {name} is the draw of component {component}")
        lines += [
            f"{weight}[{j}] <- {literal(c.weight)}" for j, c in enumerate(prior.components, start=1)
        ]
        lines.append(f"{component} ~ dcat({weight}[])")
        lines += [_draw(prior, j - 1, f"{draw}[{j}]") for j in range(1, len(prior.components) + 1)]
        lines.append(f"{name} <- {draw}[{component}]")
    if natural is not None:
        lines.append(f"{natural} <- {_NATURAL[prior.scale]}({name})")
    return "\n".join(lines) + "\n"
