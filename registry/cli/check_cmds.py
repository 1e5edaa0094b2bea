"""Commands that check a built prior without writing anything: predict, update, sensitivity."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any

from registry.caution import CAUTION
from registry.cli.common import (
    DbOption,
    JsonOption,
    err,
    ledger,
    make_table,
    number,
    option,
    out,
    print_json,
)
from registry.cli.prior_cmds import Label
from registry.errors import CheckFailed, InputError

N = Annotated[float | None, option("--n", "N", "Participants (a proportion's prior).")]
Exposure = Annotated[float | None, option("--exposure", "E", "Exposure (a rate's prior).")]
Se = Annotated[float | None, option("--se", "S", "Standard error on the analysis scale.")]
Events = Annotated[float | None, option("--events", "X", "Events observed.")]
Estimate = Annotated[float | None, option("--estimate", "Y", "Estimate on the analysis scale.")]
Plot = Annotated[Path | None, option("--plot", "FILE", "Write a figure (.png, .pdf or .svg).")]


def _checked(plot: Path | None) -> Path | None:
    """The figure's path, checked before any work is done."""
    if plot is None:
        return None
    from registry.report.checks_plots import figure_path

    return figure_path(plot)


def _show(
    result: Any,
    render: Callable[[dict[str, Any]], None],
    *,
    draw: str,
    plot: Path | None,
    as_json: bool,
) -> None:
    """Warnings on stderr, the figure (the drawing named `draw` in
    `registry.report.checks_plots`) if asked, then the JSON document or its text."""
    for warning in result.warnings:
        err.print(f"warning: {warning}")
    if plot is not None:
        from registry.report import checks_plots

        err.print(f"figure written to {getattr(checks_plots, draw)(plot, result)}")
    doc = result.to_dict()
    if as_json:
        print_json(doc)
        return
    render(doc)
    err.print(CAUTION)


def _summary_rows(table: Any, doc: dict[str, Any]) -> None:
    table.add_row("mean", number(doc["mean"]))
    table.add_row("sd", "not finite" if doc["sd"] is None else number(doc["sd"]))
    for q, v in doc["quantiles"].items():
        table.add_row(f"{float(q):.1%} quantile", number(v))


def predict(
    label: Label,
    n: N = None,
    exposure: Exposure = None,
    se: Se = None,
    plot: Plot = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """The prior predictive of a planned study's result (nothing is written).

    Example: priorledger predict falls-control-rate --exposure 150
    """
    from registry.checks.predictive import predict as run

    plot = _checked(plot)
    result = run(ledger(db), label, n=n, exposure=exposure, se=se)
    _show(result, render_prediction, draw="predictive_plot", plot=plot, as_json=as_json)


def render_prediction(doc: dict[str, Any]) -> None:
    """A prediction's JSON document as text."""
    out.print(f"{doc['prior']}: predictive of the planned study's {doc['outcome']} {doc['design']}")
    table = make_table("", "value")
    _summary_rows(table, doc)
    if doc["plausible"] is not None:
        lo, hi = doc["plausible_range"]
        table.add_row(f"P({lo:g} <= result <= {hi:g})", number(doc["plausible"]))
    out.print(table)
    accuracy = f" (accuracy {doc['accuracy']:.2g})" if doc["accuracy"] else ""
    out.print(f"method: {doc['method']}{accuracy}")


def update(
    label: Label,
    events: Events = None,
    n: N = None,
    exposure: Exposure = None,
    estimate: Estimate = None,
    se: Se = None,
    conflict_level: Annotated[
        float | None,
        option("--conflict-level", "A", "Exit 1 when the conflict tail probability is below A."),
    ] = None,
    plot: Plot = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """The exact posterior after new data and the prior-data conflict check (nothing is written).

    Example: priorledger update falls-control-rate --events 160 --exposure 150
    """
    from registry.checks.posterior import update_prior

    plot = _checked(plot)
    result = update_prior(
        ledger(db),
        label,
        events=events,
        n=n,
        exposure=exposure,
        estimate=estimate,
        se=se,
        conflict_level=conflict_level,
    )
    _show(result, render_update, draw="update_plot", plot=plot, as_json=as_json)
    if result.conflict.conflict:
        raise CheckFailed(
            f"prior-data conflict: tail probability {result.conflict.p_value:.4g} is below "
            f"{conflict_level:g}"
        )


def render_update(doc: dict[str, Any]) -> None:
    """An update's JSON document as text."""
    post = doc["posterior"]
    out.print(f"{doc['prior']} updated with {doc['data']} ({post['scale']} scale)")
    table = make_table("posterior", "value")
    _summary_rows(table, post)
    out.print(table)
    weights = make_table("component", "family", "prior weight", "posterior weight")
    for i, (c, a, b) in enumerate(
        zip(post["components"], doc["weights"]["prior"], doc["weights"]["posterior"], strict=True)
    ):
        weights.add_row(str(i + 1), c["family"], number(a), number(b))
    out.print(weights)
    out.print(f"method: {post['method']}")
    c = doc["conflict"]
    out.print(f"conflict: tail probability {c['p_value']:.4g} ({c['method']})")


def _values(text: str | None) -> list[float] | None:
    if text is None:
        return None
    try:
        return [float(v) for v in text.split(",")]
    except ValueError:
        raise InputError(
            f"expected numbers separated by commas, got {text!r}", field="--values"
        ) from None


def sensitivity(
    label: Label,
    over: Annotated[str, option("--over", "power|robust_weight", "The setting to vary.")],
    events: Events = None,
    n: N = None,
    exposure: Exposure = None,
    estimate: Estimate = None,
    se: Se = None,
    values: Annotated[str | None, option("--values", "V1,V2,...", "Values of the setting.")] = None,
    above: Annotated[
        float | None, option("--probability-above", "X", "Posterior P(theta > X), prior's scale.")
    ] = None,
    below: Annotated[
        float | None, option("--probability-below", "X", "Posterior P(theta < X), prior's scale.")
    ] = None,
    decide: Annotated[
        float | None, option("--decide", "C", "Find where the probability crosses C.")
    ] = None,
    tolerance: Annotated[
        float, option("--tolerance", "T", "Tolerance of the tipping point (default 0.001).")
    ] = 1e-3,
    plot: Plot = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """The posterior across discount settings, rebuilt without storing, and the tipping point.

    Example: priorledger sensitivity falls-control-rate --events 160 --exposure 150 --over power
    """
    from registry.checks.sensitivity import sensitivity as run

    plot = _checked(plot)
    result = run(
        ledger(db),
        label,
        over=over,
        values=_values(values),
        events=events,
        n=n,
        exposure=exposure,
        estimate=estimate,
        se=se,
        above=above,
        below=below,
        decide=decide,
        tolerance=tolerance,
    )
    _show(result, render_sensitivity, draw="sensitivity_plot", plot=plot, as_json=as_json)


def render_sensitivity(doc: dict[str, Any]) -> None:
    """A sensitivity sweep's JSON document as text."""
    out.print(f"{doc['prior']} with {doc['data']}, over {doc['over']} (nothing stored)")
    for side, threshold in (doc["event"] or {}).items():
        out.print(f"probability: posterior P(theta {side} {threshold:g}), the prior's scale")
    table = make_table(
        doc["over"], f"ESS ({doc['ess_unit']})", "mean", "2.5%", "97.5%", "probability"
    )
    for row in doc["rows"]:
        q = row["posterior"]["quantiles"]
        table.add_row(
            f"{row['value']:g}",
            "none" if row["ess"] is None else f"{row['ess']:.1f}",
            number(row["posterior"]["mean"]),
            number(q["0.025"]),
            number(q["0.975"]),
            number(row.get("probability")),
        )
    out.print(table)
    if doc["tipping_point"] is not None:
        out.print(f"tipping point: {doc['tipping_point']:.4f} (tolerance {doc['tolerance']:g})")
    elif doc["decide"] is not None:
        out.print(f"tipping point: none ({doc['tipping_note']})")
