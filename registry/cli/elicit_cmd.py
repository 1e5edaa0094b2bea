"""`priorledger elicit`: fit experts' quantile judgements and store them as entries."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from registry.cli.common import (
    CreateSourcesOption,
    DbOption,
    DecimalCommaOption,
    JsonOption,
    err,
    ledger,
    make_table,
    number,
    out,
    print_json,
)


def elicit(
    sheet: Annotated[Path, typer.Argument(metavar="FILE", help="Judgement sheet, .csv or .xlsx.")],
    family: Annotated[
        str,
        typer.Option(
            "--family",
            metavar="NAME",
            help="Distribution on the analysis scale: normal, lognormal or gamma.",
        ),
    ] = "normal",
    pool: Annotated[
        str | None,
        typer.Option(
            "--pool", metavar="METHOD", help="Also store the experts' pool: linear (equal weights)."
        ),
    ] = None,
    plot: Annotated[
        Path | None,
        typer.Option("--plot", metavar="FILE", help="Figure of the fits: .png, .pdf or .svg."),
    ] = None,
    dry_run: Annotated[
        bool, typer.Option("--dry-run", help="Fit and report; write nothing.")
    ] = False,
    decimal_comma: DecimalCommaOption = False,
    create_sources: CreateSourcesOption = True,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Fit each expert's quantile judgements and store one entry per expert (design expert).

    Example: priorledger elicit panel.csv --pool linear --plot panel.png
    """
    report, elicitation = ledger(db).import_elicitation(
        sheet,
        family=family,
        pool=pool,
        dry_run=dry_run,
        decimal_comma=decimal_comma,
        create_sources=create_sources,
    )
    if plot is not None:
        from registry.report.elicitation import elicitation_plot

        elicitation_plot(plot, elicitation)
        err.print(f"figure written to {plot}")
    if as_json:
        print_json({**elicitation.to_dict(), "import": report.to_dict()})
        return
    table = make_table("expert", "quantity", "family", "y", "se", "rms error", "max error")
    for fit in elicitation.fits:
        table.add_row(
            fit.expert,
            fit.quantity,
            fit.family,
            number(fit.mean),
            number(fit.sd),
            number(fit.rms_error),
            number(fit.max_error),
        )
    for p in elicitation.pools:
        table.add_row("linear pool", p.members[0].quantity, "mixture", number(p.mean),
                      number(p.sd), "", "")  # fmt: skip
    out.print(table)
    add = "would add" if dry_run else "added"
    err.print(
        f"{sheet}: {len(elicitation.fits)} expert fits, {len(elicitation.pools)} pools; "
        f"{add} {len(report.planned('add'))} entries, {report.skipped} already in the registry"
    )
