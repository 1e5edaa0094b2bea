"""Figures of a built prior for the reviewer's report, returned as SVG text (matplotlib).

- `discount_forest_svg`: each entry's 95% interval as reported (y ± 1.96 se) and after its
  discount (power weight, Ibrahim & Chen 2000; additive bias, Turner et al. 2009:
  y - shift ± 1.96 sqrt(se²/a + v)), with its share of the prior's information; the layout
  of a forest plot is common practice (Borenstein et al. 2009, ch. 4).
- `predictive_svg`: the exact target density (the meta-analytic predictive distribution,
  Neuenschwander et al. 2010) against the emitted mixture on the analysis scale, with the
  robust component (Schmidli et al. 2014) drawn separately at its weight.

The SVG is written without a date and with a fixed hash salt, so one build gives one figure.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from registry.priors.ratings import Discount, apply_normal
from registry.values.prior import Component, Prior
from registry.values.scales import analysis_slope, in_domain, to_natural

Z95 = 1.959963984540054  # the standard normal's 0.975 quantile


@dataclass(frozen=True)
class ForestRow:
    label: str
    y: float
    se: float
    discount: Discount
    share: float


def svg_text(figure: Any) -> str:
    """The figure as SVG text, drawn in memory."""
    import matplotlib

    buffer = io.StringIO()
    with matplotlib.rc_context({"svg.hashsalt": "priorledger", "svg.fonttype": "path"}):
        figure.savefig(buffer, format="svg", metadata={"Date": None})
    text = buffer.getvalue()
    return text[text.index("<svg") :]


def discount_forest_svg(rows: Sequence[ForestRow], scale: str) -> str:
    """Before and after discount, one pair of lines an entry; the share is printed and sizes
    the marker of the discounted interval."""
    from matplotlib.figure import Figure

    figure = Figure(figsize=(8.0, 0.45 * len(rows) + 1.6))
    ax = figure.add_subplot()
    for i, row in enumerate(rows):
        pos = len(rows) - i
        y_adj, se_adj = apply_normal(row.y, row.se, row.discount)
        ax.plot([row.y - Z95 * row.se, row.y + Z95 * row.se], [pos + 0.15] * 2, color="0.55")
        ax.plot(row.y, pos + 0.15, "o", color="0.55", markersize=4)
        ax.plot([y_adj - Z95 * se_adj, y_adj + Z95 * se_adj], [pos - 0.15] * 2, color="C0")
        ax.plot(y_adj, pos - 0.15, "s", color="C0", markersize=3 + 12 * row.share**0.5)
    ax.set_yticks(
        [len(rows) - i for i in range(len(rows))],
        [f"{r.label}  ({100 * r.share:.1f}%)" for r in rows],
    )
    ax.set_ylim(0.3, len(rows) + 0.7)
    ax.set_xlabel(f"estimate on the {scale} scale; grey: as reported, blue: after discount")
    ax.set_title("95% intervals before and after discount")
    figure.tight_layout()
    return svg_text(figure)


def _on_analysis_scale(prior: Prior, analysis: str, phi: Any) -> Any:
    """The density of g(X) at `phi` for X ~ prior on its natural scale: f(x) / g'(x)."""
    import numpy as np

    if prior.scale == analysis:
        return np.asarray(prior.pdf(phi))
    x = np.array([to_natural(analysis, float(p)) for p in phi])
    slope = np.array(
        [analysis_slope(analysis, float(v)) if in_domain(analysis, v) else np.inf for v in x]
    )
    return np.asarray(prior.pdf(x)) / slope


def predictive_svg(
    x: Any,
    exact: Any,
    emitted: Prior,
    analysis: str,
    robust: Component | None,
    caption: str,
) -> str:
    """The exact density on `x` against the emitted prior; with a robust component (the last
    one, `with_vague_component`), also the fitted mixture without it and the robust part alone
    at its weight."""
    from matplotlib.figure import Figure

    figure = Figure(figsize=(8.0, 4.2))
    ax = figure.add_subplot()
    ax.plot(x, exact, color="black", lw=2.2, label="exact predictive (target)")
    ax.plot(
        x,
        _on_analysis_scale(emitted, analysis, x),
        color="C1",
        lw=1.4,
        ls="--",
        label=f"emitted prior ({len(emitted.components)} components)",
    )
    if robust is not None:
        fitted = emitted.components[:-1]
        total = sum(c.weight for c in fitted)
        informative = Prior.candidate(
            emitted.scale, tuple(c.reweighted(c.weight / total) for c in fitted)
        )
        ax.plot(
            x,
            _on_analysis_scale(informative, analysis, x),
            color="C0",
            lw=1.2,
            label="fitted mixture, without the robust part",
        )
        alone = Prior.candidate(emitted.scale, (robust.reweighted(1.0),))
        ax.plot(
            x,
            robust.weight * _on_analysis_scale(alone, analysis, x),
            color="C2",
            lw=1.2,
            ls=":",
            label=f"robust component x {robust.weight:g}",
        )
    ax.set_xlabel(f"parameter on the {analysis} scale")
    ax.set_ylabel("density")
    ax.set_title(caption, fontsize=9)
    ax.legend(fontsize=8)
    figure.tight_layout()
    return svg_text(figure)
