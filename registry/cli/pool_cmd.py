"""`priorledger pool`: pool a selection of entries."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from registry.cli.common import (
    DbOption,
    IdOption,
    JsonOption,
    MeasureOption,
    QuantityOption,
    SourceOption,
    TagOption,
    err,
    out,
    output_file,
    print_json,
    reading,
)


def _interval(pair: Any, scale: str) -> str:
    from registry.values.scales import to_natural

    if pair is None:
        return "not available"
    lo, hi = pair
    text = f"[{lo:.4f}, {hi:.4f}]"
    if scale != "identity":
        text += f"  natural [{to_natural(scale, lo):.4g}, {to_natural(scale, hi):.4g}]"
    return text


def pool(
    quantity: QuantityOption = None,
    measure: MeasureOption = None,
    tag: TagOption = None,
    source: SourceOption = None,
    entry: IdOption = None,
    method: Annotated[
        str, typer.Option(metavar="METHOD", help="common, dl, pm, reml, ml or bayes.")
    ] = "reml",
    likelihood: Annotated[
        str,
        typer.Option(metavar="LIKELIHOOD", help="normal, or exact (count likelihood; bayes only)."),
    ] = "normal",
    tau_prior: Annotated[
        str | None,
        typer.Option(
            metavar="PRIOR",
            help="bayes: half-normal:S, half-t:S,DF or log-normal:M,S (S may be K*unit_sd); "
            "default half-normal:0.5 on log and logit scales, required on others.",
        ),
    ] = None,
    unit_sd: Annotated[
        float | None,
        typer.Option(
            "--unit-sd",
            metavar="SD",
            help="bayes: the sd of one unit's observation, for K*unit_sd.",
        ),
    ] = None,
    mu_prior: Annotated[
        str, typer.Option(metavar="PRIOR", help="bayes: flat or normal:MEAN,SD.")
    ] = "flat",
    hksj: Annotated[
        bool, typer.Option("--hksj", help="Hartung-Knapp-Sidik-Jonkman interval.")
    ] = False,
    include_retracted: Annotated[
        bool,
        typer.Option(
            "--include-retracted", help="Pool entries of retracted sources too (say why)."
        ),
    ] = False,
    plot: Annotated[
        Path | None, typer.Option(metavar="FILE", help="Write a forest plot (.png, .pdf or .svg).")
    ] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Pool a selection of entries by a frequentist or Bayesian method.

    Example: priorledger pool --quantity falls-rate-control-12m --method bayes --likelihood exact
    """
    if plot is not None:
        output_file(plot, "--plot")
    from registry.priors.selection import pool_entries, repeated_studies, without_retracted

    with reading(db) as reads:
        matched = reads.entries(
            quantity=quantity,
            measure=measure,
            tags=tag or (),
            sources=source or (),
            ids=entry or (),
            include_retracted=True,
        )
    entries, left_out = without_retracted(matched, include_retracted)
    if left_out:
        err.print(
            f"note: entries {[e.id for e in left_out]} come from retracted sources and are left "
            "out (--include-retracted to pool them)"
        )
    elif include_retracted and any(e.retracted for e in entries):
        err.print(
            f"warning: entries {[e.id for e in entries if e.retracted]} come from retracted "
            "sources and are pooled, as asked"
        )
    for study, ids in repeated_studies(entries).items():
        err.print(
            f"warning: study {study} is reported by entries {ids}; it counts more than "
            "once here (a prior definition must choose one)"
        )
    result = pool_entries(
        entries,
        method=method,
        likelihood=likelihood,
        tau_prior=tau_prior,
        mu_prior=mu_prior,
        hksj=hksj,
        unit_sd=unit_sd,
        include_retracted=include_retracted,
    )
    if plot is not None:
        from registry.report.forest import entries_forest_plot

        written = entries_forest_plot(plot, entries, result, title=quantity or None)
        err.print(f"forest plot written to {written}")
    if as_json:
        print_json({**result.to_dict(), "entries": [e.id for e in entries]})
        return
    render(result, entries[0].scale)


def render(result: Any, scale: str) -> None:
    """A pooled result as text, on the analysis scale and, where it differs, the natural one."""
    from rich.text import Text

    from registry.values.scales import to_natural

    natural = "" if scale == "identity" else f" (natural {to_natural(scale, result.mu):.4g})"
    out.print(
        Text.assemble((result.method, "bold"), f" pooling of k = {result.k} on the {scale} scale")
    )
    out.print(f"  mu          {result.mu:.4f}{natural}, se {result.se:.4f}")
    out.print(
        f"  95% {'CrI' if result.method == 'bayes' else 'CI '}     {_interval(result.ci, scale)}"
    )
    tau2 = "not estimable" if result.tau2 is None else f"{result.tau2:.4f}"
    i2 = "" if result.i2 is None else f", I² {result.i2:.1f}%"
    out.print(f"  tau²        {tau2}{i2}, Q {result.q:.3f}")
    out.print(f"  prediction  {_interval(result.prediction, scale)}")
    hksj = getattr(result, "prediction_hksj", None)  # frequentist results with --hksj only
    if hksj is not None:
        out.print(f"  prediction, Hartung-Knapp variant  {_interval(hksj, scale)}")
    predictive = result.predictive
    if predictive is not None:
        quantiles = ", ".join(
            f"{k}: {v:.4f}"
            for k, v in predictive.quantiles.items()
            if k in ("0.025", "0.5", "0.975")
        )
        out.print(f"  predictive  mean {predictive.mean:.4f}, sd {predictive.sd:.4f}; {quantiles}")
    for note in result.notes:
        out.print(f"  note: {note}")
