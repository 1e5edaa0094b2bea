"""Forest plot: each study's estimate and interval, the pooled estimate as a diamond, and the
prediction interval beneath it (the layout is common practice; see e.g. Borenstein, Hedges,
Higgins & Rothstein 2009, Introduction to Meta-Analysis, ch. 4).

Geometry is always on the analysis scale, so intervals stay symmetric; with `natural=True`
the axis is labelled on the natural scale (ratios on a log axis, probabilities on a logit
axis, correlations for Fisher's z).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path
from statistics import NormalDist
from typing import Any

from registry.errors import InputError
from registry.values import scales

FORMATS = ("png", "pdf", "svg")

# Where "no effect" sits on the analysis scale; a logit is a level, not a contrast.
_NO_EFFECT = {"identity": 0.0, "log": 0.0, "fisher_z": 0.0}


def figure_format(path: Path) -> str:
    """The figure format a file name asks for (its suffix), or an error naming the choices."""
    fmt = path.suffix.lower().lstrip(".")
    if fmt not in FORMATS:
        raise InputError(
            f"the figure's file name must end in .{', .'.join(FORMATS)}; got {path.name!r}",
            field="path",
        )
    return fmt


def forest_plot(
    path: str | Path,
    labels: Sequence[str],
    y: Sequence[float],
    se: Sequence[float],
    result: Any,
    *,
    scale: str = "identity",
    weights: Sequence[float] | None = None,
    title: str | None = None,
    natural: bool = True,
    no_effect_line: bool = True,
) -> Path:
    """Draw a forest plot and write it to `path` (format from the suffix: png, pdf or svg).

    `result` is any object with attributes mu, ci, prediction, method, k, tau2 and i2 (a
    frequentist or a Bayesian pooled result); its `level` (default 0.95) sets the study
    intervals y_i ± z se_i. `weights` are percentages shown beside each study and size its
    square; by default the result's own `weights` if it has them, else the squares are
    sized by precision 1/se_i² and no weight column is shown. `no_effect_line` draws the line
    of no effect (0 on the analysis scale) for identity, log and fisher_z; set it False when
    the identity scale holds a level (a mean) rather than a contrast.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    from matplotlib.patches import Polygon

    path = Path(path)
    fmt = figure_format(path)
    if scale not in scales.SCALES:
        raise InputError(
            f"scale must be one of {', '.join(scales.SCALES)}; got {scale!r}", field="scale"
        )
    k = len(y)
    if not (len(labels) == len(se) == k) or k == 0:
        raise InputError(
            f"labels, y and se must be non-empty and of one length; got "
            f"{len(labels)}, {k} and {len(se)}",
            field="labels",
        )
    if weights is None:
        weights = getattr(result, "weights", None)
    if weights is not None and len(weights) != k:
        raise InputError(
            f"weights must have one value per study; got {len(weights)} for {k} studies",
            field="weights",
        )

    def show(x: float) -> float:
        return scales.to_natural(scale, x) if natural else x

    level = float(getattr(result, "level", 0.95))
    z = NormalDist().inv_cdf((1.0 + level) / 2.0)
    size = list(weights) if weights is not None else [1.0 / s**2 for s in se]

    digits = _decimals(scale if natural else "identity", [show(v) for v in y])

    def number(x: float) -> str:
        return f"{round(show(x), digits) or 0.0:.{digits}f}"  # `or` turns -0.0 into 0.0

    def summary(lo: float, mid: float | None, hi: float) -> str:
        interval = f"[{number(lo)}, {number(hi)}]"
        return interval if mid is None else f"{number(mid)} {interval}"

    intervals = [(est - z * s, est, est + z * s) for est, s in zip(y, se, strict=True)]
    mu, (lo, hi) = result.mu, result.ci
    head = ("Study", f"Estimate [{100 * level:g}% CI]")
    method = result.method + (", HKSJ" if getattr(result, "hksj", False) else "")
    pooled = (f"Pooled ({method})", summary(lo, mu, hi))
    predicted = (
        "Prediction interval",
        "not available"
        if result.prediction is None
        else summary(result.prediction[0], None, result.prediction[1]),
    )
    left_texts = [head[0], pooled[0], predicted[0], *map(str, labels)]
    right_texts = [head[1], pooled[1], predicted[1], *(summary(*i) for i in intervals)]

    # Column widths in inches from the longest text (about 0.08 in a character at 10 pt).
    label_in = 0.3 + 0.08 * max(map(len, left_texts))
    text_in = 0.3 + 0.085 * max(map(len, right_texts)) + (0.7 if weights is not None else 0)
    plot_in = 4.6
    width = label_in + plot_in + text_in + 0.4
    height = 1.6 + 0.32 * (k + 3)
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    grid = fig.add_gridspec(
        1,
        3,
        width_ratios=(label_in, plot_in, text_in),
        wspace=0.0,
        left=0.2 / width,
        right=1 - 0.2 / width,
        top=1 - (0.55 if title else 0.15) / height,
        bottom=1.0 / height,
    )
    ax_label, ax, ax_text = (fig.add_subplot(grid[0, i]) for i in range(3))
    # Rows from the top: the header, one per study, then the diamond and prediction interval.
    top, pooled_row, prediction_row = k + 2.0, 1.0, 0.3
    rows = [top - i for i in range(1, k + 1)]
    for side in (ax_label, ax_text):
        side.set_xlim(0, 1)
        side.axis("off")
    for axis in (ax_label, ax, ax_text):
        axis.set_ylim(-0.3, top + 0.6)
    mono: dict[str, Any] = {"va": "center", "family": "monospace"}
    bold = {"weight": "bold"}
    missing = {"color": "0.45"} if result.prediction is None else {}
    for row, (left, right), left_style, right_style in [
        (top, head, bold, {"va": "center"} | bold),
        (pooled_row, pooled, bold, mono | bold),
        (prediction_row, predicted, {}, mono | missing),
    ]:
        ax_label.text(0, row, left, va="center", **left_style)
        ax_text.text(0.02, row, right, **right_style)
    if weights is not None:
        ax_text.text(0.98, top, "Weight", weight="bold", va="center", ha="right")

    biggest = max(size)
    for row, label, (s_lo, est, s_hi), w in zip(rows, labels, intervals, size, strict=True):
        ax.plot([s_lo, s_hi], [row, row], color="0.25", lw=1.2, solid_capstyle="butt")
        ax.scatter(
            [est],
            [row],
            marker="s",
            s=12 + 160 * w / biggest,
            color="tab:blue",
            zorder=3,
            edgecolor="none",
        )
        ax_label.text(0, row, str(label), va="center")
        ax_text.text(0.02, row, summary(s_lo, est, s_hi), **mono)
        if weights is not None:
            ax_text.text(0.98, row, f"{w:.1f}%", ha="right", **mono)

    ax.add_patch(
        Polygon(
            [(lo, pooled_row), (mu, pooled_row + 0.32), (hi, pooled_row), (mu, pooled_row - 0.32)],
            closed=True,
            color="tab:red",
            zorder=3,
        )
    )
    ax.axhline(1.6, color="0.7", lw=0.8)
    if result.prediction is not None:
        ax.plot(
            result.prediction, [prediction_row] * 2, color="tab:red", lw=2.5, solid_capstyle="butt"
        )
        ax.plot(result.prediction, [prediction_row] * 2, "|", color="tab:red", ms=9)

    if no_effect_line and scale in _NO_EFFECT:
        ax.axvline(_NO_EFFECT[scale], color="0.5", lw=0.9, ls="--", zorder=1)
    _label_axis(ax, scale, natural)
    ax.set_yticks([])
    for spine in ("left", "right", "top"):
        ax.spines[spine].set_visible(False)

    tau2 = getattr(result, "tau2", None)
    i2 = getattr(result, "i2", None)
    stats_line = [f"k = {result.k}", f"method: {method}"]
    stats_line.append("τ² not estimated" if tau2 is None else f"τ² = {tau2:.3g}")
    if i2 is not None:
        stats_line.append(f"I² = {i2:.0f}%")
    fig.text(0.2 / width, 0.3 / height, "   ".join(stats_line), fontsize=9, color="0.2")
    note = f"analysis scale: {scale}"
    if natural and scale != "identity":
        note += f"; shown as {scales.NATURAL_NAME[scale]}"
    fig.text(
        1 - 0.2 / width, 0.3 / height, note, fontsize=9, color="0.2", ha="right", style="italic"
    )
    if title:
        fig.suptitle(title, weight="bold", y=1 - 0.2 / height)
    fig.savefig(path, format=fmt, dpi=150)
    return path


def _decimals(scale: str, values: Sequence[float]) -> int:
    """Decimals (2 to 4) that keep about two significant figures where it matters: of a
    typical value on a linear scale, of the smallest ratio, of the proportion nearest 0 or 1."""
    if scale == "log":
        typical = min(values)
    elif scale == "logit":
        typical = min(min(v, 1.0 - v) for v in values)
    else:
        typical = sorted(abs(v) for v in values)[len(values) // 2]
    if typical <= 0.0:
        return 2
    return min(4, max(2, 1 - math.floor(math.log10(typical))))


def _label_axis(ax: Any, scale: str, natural: bool) -> None:
    """Ticks at round natural-scale values, placed at their analysis-scale positions."""
    from matplotlib.ticker import FixedLocator, FuncFormatter, MaxNLocator

    if not natural or scale == "identity":
        ax.xaxis.set_major_locator(MaxNLocator(nbins=7))
        return
    lo, hi = ax.get_xlim()
    # Keep round values at least an eighth of the axis apart so their labels never collide.
    positions: list[float] = []
    natural_lo, natural_hi = scales.to_natural(scale, lo), scales.to_natural(scale, hi)
    for tick in _round_ticks(scale, natural_lo, natural_hi):
        at = scales.to_analysis(scale, tick)
        if lo <= at <= hi and (not positions or at - positions[-1] >= (hi - lo) / 8):
            positions.append(at)
    ax.xaxis.set_major_locator(FixedLocator(positions))
    ax.xaxis.set_major_formatter(
        FuncFormatter(lambda x, _pos: f"{scales.to_natural(scale, x):.3g}")
    )
    ax.set_xlim(lo, hi)
    ax.set_xlabel(scales.NATURAL_NAME[scale].capitalize())


# Round probabilities for a logit axis, dense near 0 and 1 where the logit stretches; the
# coarse set is used when the fine one would crowd the axis.
_PROBABILITIES = (
    0.001,
    0.002,
    0.005,
    0.01,
    0.02,
    0.05,
    0.1,
    0.2,
    0.3,
    0.4,
    0.5,
    0.6,
    0.7,
    0.8,
    0.9,
    0.95,
    0.98,
    0.99,
    0.995,
    0.998,
    0.999,
)
_COARSE_PROBABILITIES = (0.001, 0.01, 0.1, 0.5, 0.9, 0.99, 0.999)


def _round_ticks(scale: str, lo: float, hi: float) -> list[float]:
    """Round values for a natural-scale axis between lo and hi (natural units)."""
    if scale == "fisher_z":
        from matplotlib.ticker import MaxNLocator

        return [float(t) for t in MaxNLocator(nbins=6).tick_values(lo, hi) if -1 < t < 1]
    if scale == "log":
        decades = range(math.floor(math.log10(lo)), math.ceil(math.log10(hi)) + 1)
        fine = [m * 10.0**d for d in decades for m in (1, 2, 5)]
        coarse = [10.0**d for d in decades]
    else:
        fine, coarse = list(_PROBABILITIES), list(_COARSE_PROBABILITIES)
    ticks = [t for t in fine if lo <= t <= hi]
    return ticks if len(ticks) <= 9 else [t for t in coarse if lo <= t <= hi]


def entries_forest_plot(
    path: str | Path, entries: Sequence[Any], result: Any, *, title: str | None = None
) -> Path:
    """A forest plot of registry entries (one row per entry, labelled by source) and their
    pooled result; levels (a rate, a proportion, a mean) get no line of no effect."""
    from registry.values.measures import measure

    if not entries:
        raise InputError("no entries to plot", field="entries")
    row = measure(entries[0].measure)
    return forest_plot(
        path,
        [e.source for e in entries],
        [e.y for e in entries],
        [e.se for e in entries],
        result,
        scale=row.scale,
        title=title,
        no_effect_line=not row.is_level,
    )
