"""A versioned JSON description of a prior that loads back into an identical prior.

The document is the prior's own dictionary (`Prior.to_dict`, scipy-style parameters) with
a format name and version in front and a few derived, read-only figures (mean, sd,
quantiles, meaning) for tools that only want to display it. Loading reads only the prior's
own fields, so the derived figures can never change the prior or its digest.
"""

from __future__ import annotations

import json
from typing import Any

from registry.caution import CAUTION
from registry.emit.common import meaning
from registry.errors import InputError
from registry.values.prior import Prior

FORMAT = "priorledger.prior"
FORMAT_VERSION = 1
_QUANTILES = (0.025, 0.05, 0.25, 0.5, 0.75, 0.95, 0.975)


def render(prior: Prior) -> str:
    doc: dict[str, Any] = {"format": FORMAT, "format_version": FORMAT_VERSION, **prior.to_dict()}
    doc["summary"] = {
        "meaning": meaning(prior),
        "support": prior.components[0].support,
        "mean": prior.mean(),
        "sd": prior.var() ** 0.5,
        "quantiles": {str(q): prior.ppf(q) for q in _QUANTILES},
        "stale": list(prior.stale),
        "caution": CAUTION,
    }
    return json.dumps(doc, indent=2, allow_nan=False) + "\n"


def load(text: str) -> Prior:
    """The prior a document written by `render` describes; InputError if it is not one."""
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as err:
        raise InputError(f"not JSON: {err.msg} at line {err.lineno}", row=err.lineno) from None
    if not isinstance(doc, dict) or doc.get("format") != FORMAT:
        raise InputError(
            f"not a priorledger prior document (format must be {FORMAT!r})", field="format"
        )
    version = doc.get("format_version")
    if version != FORMAT_VERSION:
        raise InputError(
            f"format_version {version!r} is not one this priorledger reads "
            f"({FORMAT_VERSION}); upgrade priorledger",
            field="format_version",
        )
    try:
        return Prior.from_dict(doc)
    except KeyError as err:
        raise InputError(f"the document lacks {err.args[0]!r}", field=str(err.args[0])) from None
    except (TypeError, ValueError) as err:
        raise InputError(f"the document has a malformed field: {err}", field="components") from None
