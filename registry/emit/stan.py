"""Stan: a complete program (parameters, model and, off the identity scale, generated
quantities) that compiles as it stands.

Parameterisations (Stan Functions Reference, recalled from memory): normal(mu, sigma) and
student_t(nu, mu, sigma) take standard deviations / scales; lognormal(mu, sigma) takes the
mean and sd of the log, so mu = log(scipy scale) and sigma = scipy s; beta(alpha, beta);
gamma(alpha, beta) takes shape and rate, so beta = 1 / scipy scale. A finite mixture adds
log(sum_j w_j f_j(x)) to target with log_sum_exp over log(w_j) + f_j's log density, which
is one statement on the parameter (never one sampling statement per component).
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
from registry.emit.names import natural_name
from registry.values.prior import Prior

FORMS: Forms = {
    "normal": ("normal", lambda p: {"mu": p["loc"], "sigma": p["scale"]}),
    "student_t": ("student_t", lambda p: {"nu": p["df"], "mu": p["loc"], "sigma": p["scale"]}),
    "lognormal": ("lognormal", lambda p: {"mu": math.log(p["scale"]), "sigma": p["s"]}),
    "beta": ("beta", lambda p: {"alpha": p["a"], "beta": p["b"]}),
    "gamma": ("gamma", lambda p: {"alpha": p["a"], "beta": 1.0 / p["scale"]}),
}

_DECLARATION = {"real": "real", "positive": "real<lower=0>", "unit": "real<lower=0, upper=1>"}
_NATURAL = {"log": "exp", "logit": "inv_logit", "fisher_z": "tanh"}


def density(prior: Prior, name: str) -> list[str]:
    """The model-block statement(s) that give ``name`` this prior."""
    if not prior.is_mixture:
        function, args = arguments(FORMS, prior.components[0])
        return [f"{name} ~ {function}({positional(args)});"]
    terms = []
    for c in prior.components:
        function, args = arguments(FORMS, c)
        terms.append(f"  log({literal(c.weight)}) + {function}_lpdf({name} | {positional(args)})")
    return ["target += log_sum_exp({", *(t + "," for t in terms[:-1]), terms[-1], "});"]


def render(prior: Prior, name: str) -> str:
    natural = natural_name(name, prior.scale, "stan") if has_natural(prior) else None
    lines = comment_block(header(prior, "Stan", name, natural), "//")
    lines += ["parameters {", f"  {_DECLARATION[prior.components[0].support]} {name};", "}"]
    lines += ["model {", *(f"  {line}" for line in density(prior, name))]
    lines.append("}")
    if natural is not None:
        lines += [
            "generated quantities {",
            f"  real {natural} = {_NATURAL[prior.scale]}({name});",
            "}",
        ]
    return "\n".join(lines) + "\n"
