"""Figure of a design's operating characteristics: the probability of success against the true
control value (or the true value of a one-arm design), with the prior and without borrowing,
one panel line per true effect."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from registry.errors import InputError
from registry.report.forest import FORMATS


def design_plot(path: str | Path, result: Any) -> Path:
    """Draw `result` (a `registry.checks.design.DesignResult`) and write it to `path`."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = Path(path)
    if path.suffix.lower().lstrip(".") not in FORMATS:
        raise InputError(
            f"the figure's file name must end in .{', .'.join(FORMATS)}; got {path.name!r}",
            field="--plot",
        )
    figure = Figure(figsize=(7, 4.5))
    FigureCanvasAgg(figure)
    axes = figure.add_subplot()
    effects = sorted({s.effect for s in result.scenarios}, key=lambda e: (e is None, e))
    for i, effect in enumerate(effects):
        rows = [s for s in result.scenarios if s.effect == effect]
        x = [s.control for s in rows]
        label = "" if effect is None else f" (effect {effect:g})"
        colour = f"C{i}"
        axes.plot(x, [s.success for s in rows], color=colour, label=f"with the prior{label}")
        axes.plot(
            x,
            [s.success_without_borrowing for s in rows],
            color=colour,
            linestyle="--",
            label=f"without borrowing{label}",
        )
    axes.axvline(result.prior.get("median", float("nan")), color="grey", linewidth=0.8)
    axes.set_xlabel("true control value" if result.design["arms"] == 2 else "true value")
    axes.set_ylabel("probability of success")
    axes.set_ylim(0, 1)
    axes.set_title(f"{result.prior['label']}: operating characteristics")
    axes.legend(fontsize="small")
    figure.tight_layout()
    figure.savefig(path)
    return path
