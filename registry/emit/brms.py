"""brms-style ``prior(...)`` statements for a population-level coefficient.

brms passes the distribution to Stan unchanged, so the parameterisations are Stan's (see
``registry.emit.stan``). Two priors cannot be stated and raise InputError saying what to do
instead: a mixture (a brms prior is one Stan distribution), and a prior on a bounded support
(lognormal, beta, gamma), because a coefficient is unbounded and brms 2.18 (Debian 12)
refuses ``lb``/``ub`` together with ``coef``.
"""

from __future__ import annotations

from registry.emit.common import arguments, comment_block, header, positional
from registry.emit.stan import FORMS
from registry.errors import InputError
from registry.values.prior import Prior


def render(prior: Prior, name: str) -> str:
    if prior.is_mixture:
        raise InputError(
            "brms-style prior statements cannot express a mixture; emit --to stan (or pymc, "
            "numpyro, jags), or build the prior with a single component",
            field="to",
        )
    component = prior.components[0]
    if component.support != "real":
        raise InputError(
            f"brms-style prior statements cannot put a {component.family} prior on one "
            "coefficient, which is unbounded (brms refuses lb/ub with coef); build the prior "
            "on the log or logit scale with family 'normal' or 'student_t', or emit --to stan",
            field="to",
        )
    lines = comment_block(header(prior, "brms", name, None), "#")
    lines += [
        f"# coef must be the name brms gives the predictor in your formula (b_{name} in the",
        "# fit); for the intercept, write 0 + Intercept in the formula and coef = Intercept.",
    ]
    function, args = arguments(FORMS, component)
    lines.append(f"prior({function}({positional(args)}), class = b, coef = {name})")
    return "\n".join(lines) + "\n"
