"""Figures of the checks of a built prior: the prior predictive of a planned study, the prior,
likelihood and posterior after new data, and the posterior across discount settings.

Drawn with matplotlib's Agg canvas (no display needed); the format follows the file's suffix
(png, pdf or svg). The path is checked before any work (`figure_path`) so that a slow sweep
never ends in an unwritable file. `predictive_figure` and `update_figure` return the figure
itself, which the reviewer's report draws to SVG in memory.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from registry.errors import InputError
from registry.report.forest import FORMATS

# the part of a distribution a figure shows (the rest is off the axis)
SHOWN = (0.0005, 0.9995)


def figure_path(path: str | Path) -> Path:
    """`path` if a figure can be written there: a known suffix and an existing folder."""
    path = Path(path)
    if path.suffix.lower().lstrip(".") not in FORMATS:
        raise InputError(
            f"the figure's file name must end in .{', .'.join(FORMATS)}; got {path.name!r}",
            field="--plot",
        )
    if path.is_dir():
        raise InputError(f"{path} is a folder, not a file name", field="--plot")
    if not path.parent.is_dir():
        raise InputError(f"no folder {path.parent} to write the figure in", field="--plot")
    return path


def _axes(title: str) -> tuple[Any, Any]:
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.0, 4.4))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    ax.set_title(title, fontsize=10)
    for spine in ("right", "top"):
        ax.spines[spine].set_visible(False)
    return fig, ax


def _finished(fig: Any, ax: Any) -> Any:
    ax.legend(fontsize=8, frameon=False)
    fig.tight_layout()
    return fig


def _save(fig: Any, path: str | Path) -> Path:
    path = figure_path(path)
    try:
        fig.savefig(path, format=path.suffix.lower().lstrip("."), dpi=150)
    except OSError as error:
        raise InputError(
            f"cannot write the figure to {path}: {error.strerror or error}", field="--plot"
        ) from None
    return path


def _integral(x: Any, density: Any) -> Any:
    """Cumulative trapezoid integral of `density` over `x` (x increasing, maybe unevenly)."""
    import numpy as np

    return np.concatenate([[0.0], np.cumsum((density[1:] + density[:-1]) / 2 * np.diff(x))])


def _cumulative(x: Any, density: Any) -> Any:
    cum = _integral(x, density)
    return cum / cum[-1]


def _shown_range(x: Any, *parts: tuple[Any, float]) -> tuple[float, float]:
    """The smallest range holding each (density, tail) pair's mass between its tail and 1 -
    tail."""
    import numpy as np

    cums = [(_cumulative(x, d), tail) for d, tail in parts]
    lo = min(float(np.interp(tail, c, x)) for c, tail in cums)
    hi = max(float(np.interp(1 - tail, c, x)) for c, tail in cums)
    return lo, hi


def predictive_figure(prediction: Any) -> Any:
    """Bars of P(events = k) for a count, else the density of the estimate; the definition's
    plausible range shaded, with its probability."""
    import numpy as np

    doc = prediction.to_dict()
    dist = prediction.distribution
    fig, ax = _axes(f"{doc['prior']}: prior predictive of the planned study {doc['design']}")
    x, y = dist.curve()
    if doc["outcome"] == "events":
        keep = (x >= dist.quantile(SHOWN[0])) & (x <= dist.quantile(SHOWN[1]))
        ax.bar(x[keep], y[keep], width=1.0, color="tab:blue", label="P(events = k)")
        ax.set_xlabel("events in the planned study")
        ax.set_ylabel("probability")
    else:
        ax.plot(x, y, color="tab:blue", label="predictive density")
        ax.set_xlabel("estimate on the analysis scale")
        ax.set_ylabel("density")
    if prediction.plausible_range is not None:
        lo, hi = (float(np.clip(v, x[0] - 0.5, x[-1] + 0.5)) for v in prediction.plausible_range)
        ax.axvspan(
            lo,
            hi,
            color="tab:green",
            alpha=0.15,
            label=f"plausible range: P = {doc['plausible']:.3f}",
        )
    ax.axvline(doc["mean"], color="0.3", ls="--", lw=1, label=f"mean {doc['mean']:.4g}")
    return _finished(fig, ax)


def predictive_plot(path: str | Path, prediction: Any) -> Path:
    """`predictive_figure` written to `path`."""
    return _save(predictive_figure(prediction), path)


def update_figure(result: Any) -> Any:
    """Prior, likelihood and posterior densities on the prior's scale; the likelihood is
    normalised to integrate to 1 over that scale (the posterior under a flat prior there), so
    the three curves share one axis. The title gives Box's conflict tail probability."""
    post = result.posterior
    theta, likelihood = post.theta, post.likelihood
    likelihood = likelihood / _integral(theta, likelihood)[-1]
    conflict = result.conflict
    verdict = (
        ""
        if conflict.level is None
        else f"; {'below' if conflict.conflict else 'not below'} the level {conflict.level:g}"
    )
    fig, ax = _axes(
        f"{result.prior} updated with {result.study.to_dict()}\n"
        f"prior-data conflict: tail probability p = {conflict.p_value:.3g}{verdict}"
    )
    # the prior's central 90% only: a robust mixture's vague tail would flatten the rest
    lo, hi = _shown_range(
        theta, (post.prior_density, 0.05), (likelihood, SHOWN[0]), (post.density, SHOWN[0])
    )
    inside = (theta >= lo) & (theta <= hi)
    for curve, label, style in (
        (post.prior_density, "prior", {"color": "tab:blue"}),
        (likelihood, "likelihood (normalised)", {"color": "0.4", "ls": "--"}),
        (post.density, "posterior", {"color": "tab:red", "lw": 2}),
    ):
        ax.plot(theta[inside], curve[inside], label=label, **style)
    ax.set_xlabel(f"parameter on the prior's scale ({post.scale})")
    ax.set_ylabel("density")
    return _finished(fig, ax)


def update_plot(path: str | Path, result: Any) -> Path:
    """`update_figure` written to `path`."""
    return _save(update_figure(result), path)


def sensitivity_plot(path: str | Path, result: Any) -> Path:
    """The posterior probability of the event against the setting, with the decision threshold
    and the tipping point; without an event, the posterior mean and 95% interval."""
    values = [r.value for r in result.rows]
    fig, ax = _axes(f"{result.prior}: posterior across {result.over} (nothing stored)")
    if result.event is not None:
        event = result.event.to_dict()
        side, threshold = next(iter(event.items()))
        ax.plot(
            values,
            [r.probability for r in result.rows],
            "o-",
            color="tab:red",
            label=f"P(theta {'>' if side == 'above' else '<'} {threshold:g} | data)",
        )
        ax.set_ylabel("posterior probability")
        ax.set_ylim(-0.02, 1.02)
        if result.decide is not None:
            ax.axhline(result.decide, color="0.4", ls="--", label=f"threshold {result.decide:g}")
        if result.tipping_point is not None:
            ax.axvline(
                result.tipping_point,
                color="tab:green",
                ls=":",
                label=f"tipping point {result.tipping_point:.4f}",
            )
    else:
        summaries = [r.posterior.summary for r in result.rows]
        ax.fill_between(
            values,
            [s.quantiles[0] for s in summaries],
            [s.quantiles[-1] for s in summaries],
            color="tab:blue",
            alpha=0.2,
            label="95% interval",
        )
        ax.plot(values, [s.mean for s in summaries], "o-", color="tab:blue", label="mean")
        ax.set_ylabel(f"posterior on the prior's scale ({result.rows[0].posterior.scale})")
    ax.set_xlabel(result.over.replace("_", " "))
    return _save(_finished(fig, ax), path)
