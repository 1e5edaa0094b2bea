"""Cochran's Q and the heterogeneity statistics derived from it.

Q = sum_i w_i (y_i - mu_FE)^2 with w_i = 1/se_i^2 (Cochran 1954); H^2 = Q/(k-1) and
I^2 = max(0, (Q - (k-1))/Q) (Higgins & Thompson 2002, Stat Med 21:1539).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Heterogeneity:
    q: float
    df: int
    p: float | None
    i2: float | None
    h2: float | None


def heterogeneity(y: Any, se: Any) -> Heterogeneity:
    """Q, its df and p-value, I² (as a percentage) and H²; I² and H² are None when k = 1."""
    import numpy as np
    from scipy import stats

    y = np.asarray(y, dtype=float)
    w = 1.0 / np.asarray(se, dtype=float) ** 2
    mu = float(np.sum(w * y) / np.sum(w))
    q = float(np.sum(w * (y - mu) ** 2))
    df = len(y) - 1
    if df < 1:
        return Heterogeneity(q=q, df=df, p=None, i2=None, h2=None)
    i2 = 100.0 * max(0.0, (q - df) / q) if q > 0 else 0.0
    return Heterogeneity(q=q, df=df, p=float(stats.chi2.sf(q, df)), i2=i2, h2=q / df)
