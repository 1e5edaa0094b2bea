"""The one contract every pooled result satisfies, frequentist or Bayesian.

Fields are on the analysis scale of the input: `mu` and its `se` and interval `ci`, the
between-study variance `tau2` (None where it is not estimated), Cochran's `q` and `i2`
(Higgins & Thompson 2002), the `prediction` interval for a new study's parameter (None where
there is none), plain-sentence `notes`, and `predictive`: the predictive distribution of a new
study's parameter for a Bayesian fit, None for a frequentist one.
"""

from __future__ import annotations

from typing import Any, Protocol, runtime_checkable


@runtime_checkable
class PooledResult(Protocol):
    """What callers may read from any pooled result (see the module docstring)."""

    k: int
    method: str
    mu: float
    se: float
    ci: tuple[float, float]
    tau2: float | None
    i2: float | None
    q: float
    prediction: tuple[float, float] | None
    notes: tuple[str, ...]
    predictive: Any

    def to_dict(self) -> dict[str, Any]: ...
