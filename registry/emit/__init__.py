"""Emit a prior as code for a modelling language, or as a JSON document that loads back.

``emit(prior, to, param=...)`` returns the text; every snippet starts with a header comment
(name, version, digest, scale and meaning, trace command, caution). Names that reach code
are checked by `registry.emit.names`; free text reaches code only inside comments.
"""

from __future__ import annotations

from collections.abc import Callable

from registry.emit import brms, jags, json_doc, numpyro, pymc, stan
from registry.emit.names import check_identifier, default_param
from registry.errors import InputError
from registry.values.prior import Prior

_CODE: dict[str, Callable[[Prior, str], str]] = {
    "stan": stan.render,
    "jags": jags.render,
    "pymc": pymc.render,
    "numpyro": numpyro.render,
    "brms": brms.render,
}

LANGUAGES: tuple[str, ...] = (*_CODE, "json")


def parameter_name(prior: Prior, to: str, param: str | None = None) -> str:
    """The identifier the snippet for ``to`` will use: ``param`` checked, else derived."""
    if param is None:
        return default_param(prior.name, prior.quantity, prior.scale, to)
    return check_identifier(param, to)


def emit(prior: Prior, to: str, *, param: str | None = None) -> str:
    """The prior as text for ``to`` (one of LANGUAGES).

    Raises InputError (field 'to') for an unknown language or a prior the language cannot
    express, and (field 'param') for a name that is not a safe identifier there.
    """
    if to == "json":
        if param is not None:
            raise InputError(
                "--param has no meaning for --to json, which names no parameter", field="param"
            )
        return json_doc.render(prior)
    if to not in _CODE:
        raise InputError(f"unknown language {to!r}; one of {', '.join(LANGUAGES)}", field="to")
    return _CODE[to](prior, parameter_name(prior, to, param))


def load_json(text: str) -> Prior:
    """The prior described by a document from ``emit(prior, 'json')`` (same digest)."""
    return json_doc.load(text)


__all__ = ["LANGUAGES", "emit", "load_json", "parameter_name"]
