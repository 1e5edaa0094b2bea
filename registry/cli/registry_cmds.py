"""Commands over the registry itself: init, import, sources, entries, revise."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from registry.cli.common import (
    PAGE,
    CreateSourcesOption,
    DbOption,
    DecimalCommaOption,
    EncodingOption,
    JsonOption,
    LimitOption,
    Listing,
    MeasureOption,
    OffsetOption,
    QuantityOption,
    SetOption,
    SourceOption,
    TagOption,
    UserOption,
    err,
    ledger,
    make_table,
    number,
    out,
    page,
    print_json,
    reading,
)
from registry.errors import InputError

if TYPE_CHECKING:
    from registry.storage.ledger import EntryView

sources_app = typer.Typer()
entries_app = typer.Typer()
# Revised (and not reverted) rows an import lists on stderr; --json lists every one.
SHOWN_CHANGES = 50


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
    decimal_comma: DecimalCommaOption = False,
    reason: Annotated[
        str | None,
        typer.Option(
            "--reason",
            metavar="TEXT",
            help='Reason for revisions of keyed rows (default "re-imported from FILE").',
        ),
    ] = None,
    allow_revert: Annotated[
        bool,
        typer.Option(
            "--allow-revert", help="Let a row equal to an older revision become the newest."
        ),
    ] = False,
    create_sources: CreateSourcesOption = True,
    user: UserOption = None,
    encoding: EncodingOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Import an extraction sheet: every row or, if any row is bad, none.

    A row with a row_key that is already stored with other cells becomes a new revision.

    Example: priorledger import falls-sheet.csv --dry-run
    """
    report = ledger(db).import_sheet(
        sheet,
        dry_run=dry_run,
        decimal_comma=decimal_comma,
        reason=reason,
        allow_revert=allow_revert,
        create_sources=create_sources,
        user=user,
        encoding=encoding,
    )
    if as_json:
        print_json(report.to_dict())
        return
    err.print(report.message)
    for action in ("revise", "not_reverted"):
        for plan in report.planned(action, SHOWN_CHANGES):
            changed = ", ".join(f"{k} {v['from']} -> {v['to']}" for k, v in plan.changes.items())
            verb = "revises" if plan.action == "revise" else "is not reverted:"
            err.print(f"  row {plan.row} {verb} entry {plan.entry}: {changed}")
        more = report.plan.count(action) - SHOWN_CHANGES
        if more > 0:
            err.print(f"  ... and {more} more such rows (--json lists every row)")


@sources_app.callback(invoke_without_command=True)
def sources_list(
    ctx: typer.Context,
    db: DbOption = None,
    as_json: JsonOption = False,
    limit: LimitOption = PAGE,
    offset: OffsetOption = 0,
) -> None:
    """List sources with their DOI, year, entry count and retraction state.

    Example: priorledger sources --json
    """
    if ctx.invoked_subcommand is not None:
        return
    with reading(db) as reads:
        rows = reads.sources(limit=limit + 1 if limit else None, offset=offset)
    views, following = page(rows, limit, offset, "sources")
    if as_json:
        print_json({"sources": [v.to_dict() for v in views], "next_offset": following})
        return
    table = make_table("key", "year", "doi", "entries", "retracted", "added", "citation")
    for v in views:
        table.add_row(
            v.key,
            str(v.year or ""),
            v.doi or "",
            str(v.entries),
            f"yes: {v.retraction_reason} ({_by(v.retracted_by, v.retracted_at)})"
            if v.retracted
            else "",
            _by(v.created_by, v.created_at),
            v.citation or "",
        )
    out.print(table)


@sources_app.command("import")
def sources_import(
    file: Annotated[
        Path, typer.Argument(metavar="FILE", help="Bibliography, .bib (BibTeX) or .ris (RIS).")
    ],
    update: Annotated[
        bool,
        typer.Option(
            "--update", help="Take changed metadata from the file as new source revisions."
        ),
    ] = False,
    reason: Annotated[
        str | None,
        typer.Option(
            "--reason", metavar="TEXT", help='Why, with --update (default "updated from FILE").'
        ),
    ] = None,
    user: UserOption = None,
    encoding: EncodingOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Import a bibliography; entries refer to its references by citation key.

    Example: priorledger sources import refs.bib
    """
    report = ledger(db).import_sources(
        file, update=update, reason=reason, user=user, encoding=encoding
    )
    if as_json:
        print_json(report.to_dict())
        return
    err.print(
        f"{file}: {len(report.added)} sources added, {len(report.completed)} completed, "
        f"{len(report.updated)} updated, {report.unchanged} unchanged"
    )


@sources_app.command("edit")
def sources_edit(
    key: Annotated[str, typer.Argument(metavar="KEY", help="Citation key of the source.")],
    set_: SetOption,
    reason: Annotated[str, typer.Option("--reason", metavar="TEXT", help="Why it is changed.")],
    user: UserOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Correct a source's metadata as a new revision; earlier values are kept.

    FIELD is title, authors, journal, doi, year or citation.

    Example: priorledger sources edit smith2019 --set year=2020 --reason "online first 2019"
    """
    view = ledger(db).edit_source(key, _parse_set(set_), reason, user=user)
    if as_json:
        print_json(view.to_dict())
        return
    err.print(f"source {key} updated: {view.citation or ''}")


@sources_app.command("show")
def sources_show(
    key: Annotated[str, typer.Argument(metavar="KEY", help="Citation key of the source.")],
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Show a source's metadata revisions, oldest first, with their reasons.

    Example: priorledger sources show smith2019
    """
    history = ledger(db).source_history(key)
    if as_json:
        print_json({"key": key, "revisions": history})
        return
    if not history:
        out.print(f"source {key} has not been edited since it was recorded")
        return
    table = make_table("rev", "when", "reason", "fields")
    for r in history:
        fields = "; ".join(f"{k}={v}" for k, v in r["fields"].items() if v is not None)
        table.add_row(str(r["revision"]), r["created_at"][:19], r["reason"], fields)
    out.print(table)


@sources_app.command("retract")
def sources_retract(
    key: Annotated[str, typer.Argument(metavar="KEY", help="Citation key of the source.")],
    reason: Annotated[str, typer.Option("--reason", metavar="TEXT", help="Why it is retracted.")],
    user: UserOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Flag a source as retracted (nothing is deleted; priors built on it say so).

    Example: priorledger sources retract smith2019 --reason "retracted by the journal, 2024"
    """
    view = ledger(db).retract(key, reason, user=user)
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
    limit: LimitOption = PAGE,
    offset: OffsetOption = 0,
) -> None:
    """List current entries with their derived estimate on the analysis scale.

    Example: priorledger entries --quantity falls-rate-control-12m --json
    """
    if ctx.invoked_subcommand is not None:
        return
    # a listing shows the whole registry; retracted sources are flagged, not hidden
    with reading(db) as reads:
        rows = reads.entries(
            quantity=quantity,
            measure=measure,
            tags=tag or (),
            sources=source or (),
            include_retracted=True,
            limit=limit + 1 if limit else None,
            offset=offset,
        )
    views, following = page(rows, limit, offset, "entries")
    if as_json:
        print_json({"entries": [v.to_dict() for v in views], "next_offset": following})
        return
    out.print(entries_table(views))


def entries_table(views: list[EntryView]) -> Listing:
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
    from rich.text import Text

    with reading(db) as reads:
        history = reads.entry(entry_id)
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
    table = make_table("rev", "when", "by", "reason", "y", "se")
    for r in history.revisions:
        table.add_row(
            str(r.revision),
            r.created_at[:19],
            r.created_by or "-",
            r.reason,
            number(r.y),
            number(r.se),
        )
    out.print(table)


def _by(user: str | None, when: str | None) -> str:
    """Who and when, for a listing; '-' for what older registries did not record."""
    return f"{user or '-'} {when[:19] if when else '-'}"


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
    set_: SetOption,
    reason: Annotated[
        str, typer.Option("--reason", metavar="TEXT", help="Why the entry is corrected.")
    ],
    user: UserOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Correct an entry by adding a revision; the old one is kept.

    Example: priorledger revise 3 --set upper=0.95 --reason "typo: Table 2 says 0.95"
    """
    view = ledger(db).revise(entry_id, _parse_set(set_), reason, user=user)
    if as_json:
        print_json(view.to_dict())
        return
    err.print(
        f"entry {view.id} is now at revision {view.revision}: y = {view.y:.6g}, "
        f"se = {view.se:.6g} ({view.conversion})"
    )
