"""Commands over the registry itself: init, import, sources, entries, revise."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer
from rich.text import Text

from registry.cli.common import (
    DbOption,
    EncodingOption,
    JsonOption,
    MeasureOption,
    QuantityOption,
    SourceOption,
    TagOption,
    err,
    ledger,
    make_table,
    number,
    out,
    print_json,
)
from registry.errors import InputError

if TYPE_CHECKING:
    from rich.table import Table

    from registry.storage.ledger import EntryView

sources_app = typer.Typer()
entries_app = typer.Typer()


def init(db: DbOption = None) -> None:
    """Create the registry, or bring an older one's schema up to date.

    Example: priorledger init --db lab.db
    """
    registry = ledger(db)
    err.print(f"registry ready at {registry.url}")


def import_sheet(
    sheet: Annotated[Path, typer.Argument(metavar="FILE", help="Extraction sheet, .csv or .xlsx.")],
    dry_run: Annotated[
        bool, typer.Option("--dry-run", help="Check and report; write nothing.")
    ] = False,
    encoding: EncodingOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Import an extraction sheet: every row or, if any row is bad, none.

    Example: priorledger import falls-sheet.csv --dry-run
    """
    report = ledger(db).import_sheet(sheet, dry_run=dry_run, encoding=encoding)
    if as_json:
        print_json(report.to_dict())
        return
    err.print(
        report.message
        if report.entries
        else f"{sheet}: all {report.rows} rows are already in the registry; nothing added"
    )


@sources_app.callback(invoke_without_command=True)
def sources_list(ctx: typer.Context, db: DbOption = None, as_json: JsonOption = False) -> None:
    """List sources with their DOI, year, entry count and retraction state.

    Example: priorledger sources --json
    """
    if ctx.invoked_subcommand is not None:
        return
    views = ledger(db).sources()
    if as_json:
        print_json({"sources": [v.to_dict() for v in views]})
        return
    table = make_table("key", "year", "doi", "entries", "retracted", "citation")
    for v in views:
        table.add_row(
            v.key,
            str(v.year or ""),
            v.doi or "",
            str(v.entries),
            f"yes: {v.retraction_reason}" if v.retracted else "",
            v.citation or "",
        )
    out.print(table)


@sources_app.command("import")
def sources_import(
    file: Annotated[
        Path, typer.Argument(metavar="FILE", help="Bibliography, .bib (BibTeX) or .ris (RIS).")
    ],
    encoding: EncodingOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Import a bibliography; entries refer to its references by citation key.

    Example: priorledger sources import refs.bib
    """
    report = ledger(db).import_sources(file, encoding=encoding)
    if as_json:
        print_json(report.to_dict())
        return
    err.print(
        f"{file}: {len(report.added)} sources added, {len(report.completed)} completed, "
        f"{report.unchanged} unchanged"
    )


@sources_app.command("retract")
def sources_retract(
    key: Annotated[str, typer.Argument(metavar="KEY", help="Citation key of the source.")],
    reason: Annotated[str, typer.Option("--reason", metavar="TEXT", help="Why it is retracted.")],
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Flag a source as retracted (nothing is deleted; priors built on it say so).

    Example: priorledger sources retract smith2019 --reason "retracted by the journal, 2024"
    """
    view = ledger(db).retract(key, reason)
    if as_json:
        print_json(view.to_dict())
        return
    err.print(f"source {key} flagged as retracted: {view.retraction_reason}")


@entries_app.callback(invoke_without_command=True)
def entries_list(
    ctx: typer.Context,
    quantity: QuantityOption = None,
    measure: MeasureOption = None,
    tag: TagOption = None,
    source: SourceOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """List current entries with their derived estimate on the analysis scale.

    Example: priorledger entries --quantity falls-rate-control-12m --json
    """
    if ctx.invoked_subcommand is not None:
        return
    # a listing shows the whole registry; retracted sources are flagged, not hidden
    views = ledger(db).entries(
        quantity=quantity,
        measure=measure,
        tags=tag or (),
        sources=source or (),
        include_retracted=True,
    )
    if as_json:
        print_json({"entries": [v.to_dict() for v in views]})
        return
    out.print(entries_table(views))


def entries_table(views: list[EntryView]) -> Table:
    """The current entries, one a row; `entries show ID` has the numbers as reported."""
    table = make_table("id", "source", "quantity", "measure", "y", "se", "scale", "conversion")
    for v in views:
        flag = " (retracted)" if v.retracted else ""
        table.add_row(
            str(v.id),
            v.source + flag,
            v.quantity,
            v.measure,
            number(v.y),
            number(v.se),
            v.scale,
            v.conversion,
        )
    return table


@entries_app.command("show")
def entries_show(
    entry_id: Annotated[int, typer.Argument(metavar="ID", help="Entry id.")],
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Show one entry: numbers as reported, provenance, and every revision with its reason.

    Example: priorledger entries show 3
    """
    history = ledger(db).entry(entry_id)
    if as_json:
        print_json(history.to_dict())
        return
    cur = history.current
    out.print(
        Text.assemble(
            (f"entry {cur.id}", "bold"), f" revision {cur.revision}: {cur.quantity} ({cur.measure})"
        )
    )
    out.print(
        f"  source   {cur.source}{' (RETRACTED)' if cur.retracted else ''}: "
        f"{cur.citation or ''} {('doi:' + cur.doi) if cur.doi else ''}"
    )
    out.print(f"  study    {cur.study}")
    out.print(f"  reported {', '.join(f'{k}={v}' for k, v in cur.reported.items())}")
    out.print(
        f"  derived  y = {cur.y:.6g}, se = {cur.se:.6g} on the {cur.scale} scale "
        f"by {cur.conversion}" + (f" ({'; '.join(cur.corrections)})" if cur.corrections else "")
    )
    for key, value in cur.context.items():
        out.print(f"  {key:<8} {value}")
    if cur.tags:
        out.print(f"  tags     {'; '.join(cur.tags)}")
    if history.imported_from:
        out.print(f"  imported from {history.imported_from}")
    table = make_table("rev", "when", "reason", "y", "se")
    for r in history.revisions:
        table.add_row(str(r.revision), r.created_at[:19], r.reason, number(r.y), number(r.se))
    out.print(table)


def _parse_set(values: list[str]) -> dict[str, str]:
    changes = {}
    for item in values:
        name, sep, value = item.partition("=")
        if not sep or not name.strip():
            raise InputError(f"expected FIELD=VALUE, got {item!r}", field="--set")
        changes[name.strip().lower()] = value.strip()
    return changes


def revise(
    entry_id: Annotated[int, typer.Argument(metavar="ID", help="Entry id.")],
    set_: Annotated[
        list[str],
        typer.Option(
            "--set",
            metavar="FIELD=VALUE",
            help="FIELD=VALUE; an empty VALUE clears the field. Repeatable.",
        ),
    ],
    reason: Annotated[
        str, typer.Option("--reason", metavar="TEXT", help="Why the entry is corrected.")
    ],
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Correct an entry by adding a revision; the old one is kept.

    Example: priorledger revise 3 --set upper=0.95 --reason "typo: Table 2 says 0.95"
    """
    view = ledger(db).revise(entry_id, _parse_set(set_), reason)
    if as_json:
        print_json(view.to_dict())
        return
    err.print(
        f"entry {view.id} is now at revision {view.revision}: y = {view.y:.6g}, "
        f"se = {view.se:.6g} ({view.conversion})"
    )
