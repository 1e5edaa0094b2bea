"""Figure of an elicitation: per quantity, each expert's fitted cdf on the analysis scale with
their judged quantiles as points, and the linear pool's cdf (common practice for showing a
quantile fit: the fitted curve should pass through the judged points)."""

from __future__ import annotations

from pathlib import Path

from registry.evidence.elicit import Elicitation
from registry.report.forest import figure_format
from registry.values.scales import to_analysis


def elicitation_plot(path: str | Path, elicitation: Elicitation) -> Path:
    """Draw one panel per quantity and write the figure to `path` (png, pdf or svg)."""
    import numpy as np
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = Path(path)
    fmt = figure_format(path)
    quantities = list(dict.fromkeys(f.quantity for f in elicitation.fits))
    fig = Figure(figsize=(6.5, 3.6 * len(quantities)))
    FigureCanvasAgg(fig)
    pools = {p.members[0].quantity: p for p in elicitation.pools}
    for i, quantity in enumerate(quantities):
        ax = fig.add_subplot(len(quantities), 1, i + 1)
        fits = [f for f in elicitation.fits if f.quantity == quantity]
        lo = min(f.frozen().ppf(0.001) for f in fits)
        hi = max(f.frozen().ppf(0.999) for f in fits)
        grid = np.linspace(lo, hi, 400)
        for fit in fits:
            (line,) = ax.plot(grid, fit.frozen().cdf(grid), lw=1.4, label=fit.expert)
            ax.scatter(
                [to_analysis(fit.scale, j.value) for j in fit.judgements],
                [j.level for j in fit.judgements],
                color=line.get_color(),
                zorder=3,
            )
        if quantity in pools:
            pool = pools[quantity]
            ax.plot(grid, [pool.cdf(y) for y in grid], color="black", lw=2.2, label="linear pool")
        scale = fits[0].scale
        ax.set_xlabel(f"{quantity} ({scale} scale)")
        ax.set_ylabel("cumulative probability")
        ax.set_ylim(0, 1)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=8, loc="lower right")
        ax.set_title(f"{quantity}: {fits[0].family} fits to judged quantiles (points)", fontsize=10)
    fig.tight_layout()
    fig.savefig(path, format=fmt, dpi=150)
    return path
