"""Analysis scales: where each measure is pooled, and the plain maths to move on and off it.

Every reported measure is analysed on a scale where its sampling distribution is close to
normal (which measure goes where is the measure table, `registry.values.measures`):

- ``log``: ratios (odds, risk, rate, hazard) and event rates, ``g(x) = ln x``;
- ``logit``: proportions, ``g(p) = ln(p / (1 - p))``;
- ``fisher_z``: correlations, ``g(r) = atanh r = ½ ln((1 + r) / (1 - r))`` (Fisher 1921);
- ``identity``: means, differences, standardized mean differences, regression coefficients.

This module is stdlib only, so that the CLI starts quickly.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from registry.errors import ConversionError

NATURAL_NAME: dict[str, str] = {
    "identity": "value as reported",
    "log": "ratio or rate",
    "logit": "probability",
    "fisher_z": "correlation",
}

# A prior lives on an analysis scale or, for the conjugate families, on a natural scale.
NATURAL_SCALES: dict[str, str] = {
    "probability": "probability, on its natural scale",
    "rate": "event rate (events per unit of exposure), on its natural scale",
    "ratio": "ratio, on its natural scale",
}
# The support a distribution on each scale must have.
SUPPORT: dict[str, str] = {
    "identity": "real",
    "log": "real",
    "logit": "real",
    "fisher_z": "real",
    "probability": "unit",
    "rate": "positive",
    "ratio": "positive",
}


def _logit(p: float) -> float:
    # log(p) - log1p(-p) keeps precision for p near 0 and near 1.
    return math.log(p) - math.log1p(-p)


def _expit(y: float) -> float:
    # Two branches so that exp never overflows.
    if y >= 0:
        return 1.0 / (1.0 + math.exp(-y))
    e = math.exp(y)
    return e / (1.0 + e)


@dataclass(frozen=True)
class _Scale:
    forward: Callable[[float], float]
    inverse: Callable[[float], float]
    slope: Callable[[float], float]
    contains: Callable[[float], bool]
    domain: str


_SCALES: dict[str, _Scale] = {
    "identity": _Scale(
        forward=lambda x: x,
        inverse=lambda y: y,
        slope=lambda x: 1.0,
        contains=math.isfinite,
        domain="a finite number",
    ),
    "log": _Scale(
        forward=math.log,
        inverse=math.exp,
        slope=lambda x: 1.0 / x,
        contains=lambda x: 0.0 < x < math.inf,
        domain="greater than 0",
    ),
    "logit": _Scale(
        forward=_logit,
        inverse=_expit,
        slope=lambda p: 1.0 / (p * (1.0 - p)),
        contains=lambda p: 0.0 < p < 1.0,
        domain="strictly between 0 and 1",
    ),
    "fisher_z": _Scale(
        forward=math.atanh,
        inverse=math.tanh,
        slope=lambda r: 1.0 / (1.0 - r * r),
        contains=lambda r: -1.0 < r < 1.0,
        domain="strictly between -1 and 1",
    ),
}

SCALES: tuple[str, ...] = tuple(_SCALES)
PRIOR_SCALES: tuple[str, ...] = (*SCALES, *NATURAL_SCALES)


def _scale(scale: str) -> _Scale:
    try:
        return _SCALES[scale]
    except KeyError:
        raise ConversionError(
            f"scale must be one of {', '.join(SCALES)}, got {scale!r}", field="scale"
        ) from None


def in_domain(scale: str, x: float) -> bool:
    """Whether the natural-scale value ``x`` can be put on ``scale``."""
    return _scale(scale).contains(x)


def domain(scale: str) -> str:
    """What a natural-scale value must be for ``scale``, as words for messages."""
    return _scale(scale).domain


def to_analysis(scale: str, x: float) -> float:
    """g(x): the natural-scale value ``x`` on the analysis scale (see the module docstring)."""
    s = _scale(scale)
    if not s.contains(x):
        raise ConversionError(f"a value on the {scale} scale must be {s.domain}, got {x!r}")
    return s.forward(x)


def to_natural(scale: str, y: float) -> float:
    """g⁻¹(y): exp for log, the logistic function for logit, tanh for Fisher z."""
    return _scale(scale).inverse(y)


def analysis_slope(scale: str, x: float) -> float:
    """g'(x), for the delta method: SE(g(x)) ≈ |g'(x)| SE(x) (common practice).

    ln: 1/x; logit: 1/(p(1-p)); atanh: 1/(1-r²); identity: 1.
    """
    s = _scale(scale)
    if not s.contains(x):
        raise ConversionError(f"a value on the {scale} scale must be {s.domain}, got {x!r}")
    return s.slope(x)
