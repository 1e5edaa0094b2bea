"""Input checks shared by the hierarchical models: data arrays and per-study discounts.

`a_i` in (0, 1] is the power-prior weight (Ibrahim & Chen 2000, Stat Sci 15:46); `b_i`, `v_i`
the mean and variance of an additive bias beta_i ~ N(b_i, v_i) with theta_i = mu + delta_i +
beta_i (Turner, Spiegelhalter, Smith & Thompson 2009, JRSS A 172:21).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, TypedDict

import numpy as np

from registry.errors import InputError


def as_array(name: str, values: Any, k: int | None = None) -> np.ndarray:
    """`values` as a flat float array of k (or at least one) finite numbers."""
    arr = np.asarray(values, dtype=float).ravel()
    if arr.size == 0 or (k is not None and arr.size != k):
        raise InputError(
            f"{name} needs {k if k is not None else 'at least one'} value(s), got {arr.size}",
            field=name,
        )
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must be finite numbers", field=name)
    return arr


class FitOptions(TypedDict, total=False):
    """Keyword options of the fit functions: per-study discounts and the refinement factor."""

    power: Any
    bias_shift: Any
    bias_var: Any
    refine: float


@dataclass(frozen=True)
class Discount:
    """Per-study power weights a_i and additive biases N(b_i, v_i), with notes naming them."""

    power: np.ndarray
    shift: np.ndarray
    var: np.ndarray
    notes: tuple[str, ...]


def discount(k: int, power: Any, bias_shift: Any, bias_var: Any) -> Discount:
    """Check and default the discounts: a_i = 1, b_i = v_i = 0 when not given."""
    notes = []
    a = np.ones(k) if power is None else as_array("power", power, k)
    if np.any((a <= 0) | (a > 1)):
        raise InputError("power weights must be in (0, 1]", field="power")
    if power is not None:
        notes.append("each study's likelihood raised to its power weight (Ibrahim & Chen 2000)")
    b = np.zeros(k) if bias_shift is None else as_array("bias_shift", bias_shift, k)
    v = np.zeros(k) if bias_var is None else as_array("bias_var", bias_var, k)
    if np.any(v < 0):
        raise InputError("bias variances must be >= 0", field="bias_var")
    if bias_shift is not None or bias_var is not None:
        notes.append("additive study biases N(b_i, v_i) applied (Turner et al. 2009)")
    return Discount(a, b, v, tuple(notes))
