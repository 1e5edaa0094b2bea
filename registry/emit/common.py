"""What every emitted snippet shares: number literals, argument lists and the header comment."""

from __future__ import annotations

import shlex
import textwrap
from collections.abc import Callable, Mapping

from registry import __version__
from registry.caution import CAUTION
from registry.emit.names import sanitize
from registry.errors import InputError
from registry.values.measures import MEASURES
from registry.values.prior import Component, Prior
from registry.values.scales import NATURAL_NAME, NATURAL_SCALES, to_natural

# family -> (the language's function name, the scipy parameters as that language's arguments)
Forms = Mapping[str, tuple[str, Callable[[Mapping[str, float]], dict[str, float]]]]


def literal(x: float) -> str:
    """The shortest decimal that reads back as the same double (valid in all five languages)."""
    return repr(float(x))


def arguments(forms: Forms, component: Component) -> tuple[str, dict[str, float]]:
    """The language's function name and named arguments for one component."""
    if component.family not in forms:
        raise InputError(
            f"this language has no form for a {component.family} component; emit to one "
            f"that has ({', '.join(forms)} here)",
            field="to",
        )
    function, convert = forms[component.family]
    return function, convert(component.params)


def positional(args: Mapping[str, float]) -> str:
    return ", ".join(literal(v) for v in args.values())


def keywords(args: Mapping[str, float]) -> str:
    return ", ".join(f"{k}={literal(v)}" for k, v in args.items())


def meaning(prior: Prior) -> str:
    """What a value of the parameter is, on the prior's scale."""
    row = MEASURES.get(prior.measure)
    if row is not None and row.scale == prior.scale:
        return row.meaning
    return NATURAL_SCALES.get(prior.scale, f"value on the {prior.scale} scale")


def has_natural(prior: Prior) -> bool:
    """Whether the parameter sits on a transformed scale with a natural scale to go back to."""
    return prior.scale in NATURAL_NAME and prior.scale != "identity"


def _describe(c: Component) -> str:
    params = ", ".join(f"{k}={v:.6g}" for k, v in c.params.items())
    return f"{c.family}({params})"


def header(prior: Prior, language: str, param: str, natural: str | None) -> list[str]:
    """The header as lines of comment text, each already safe for a line comment.

    The first two lines are fixed text, so that nothing a user typed can land where Python
    reads an encoding declaration (PEP 263).
    """
    q = [prior.ppf(p) for p in (0.025, 0.5, 0.975)]
    mixture = " + ".join(
        f"{c.weight:.6g} x {_describe(c)}" if prior.is_mixture else _describe(c)
        for c in prior.components
    )
    lines = [
        f"Prior emitted by priorledger {__version__} for {language}.",
        "Generated code: to change a number, rebuild the prior and emit it again.",
        f"prior: {prior.name} version {prior.version}",
        f"digest: {prior.digest}",
        f"analysis scale: {prior.scale}; {param} is the {meaning(prior)}",
    ]
    if prior.parameter:
        lines.append(f"parameter: {prior.parameter}")
    lines += [
        f"distribution (scipy.stats parameters): {mixture}",
        f"mean {prior.mean():.4g}, sd {prior.var() ** 0.5:.4g}, median {q[1]:.4g}, "
        f"95% interval [{q[0]:.4g}, {q[2]:.4g}]",
    ]
    if natural is not None:
        nq = [to_natural(prior.scale, x) for x in q]
        lines.append(
            f"natural scale ({NATURAL_NAME[prior.scale]}): {natural}, median {nq[1]:.4g}, "
            f"95% interval [{nq[0]:.4g}, {nq[2]:.4g}]"
        )
    lines += [f"STALE: {reason}; rebuild the prior before using it" for reason in prior.stale]
    lines += [f"trace: priorledger trace {shlex.quote(prior.label)}", CAUTION]
    return [
        part
        for line in lines
        for part in textwrap.wrap(sanitize(line, limit=400), 92, break_on_hyphens=False)
    ]


def comment_block(lines: list[str], marker: str) -> list[str]:
    return [f"{marker} {line}" for line in lines]
