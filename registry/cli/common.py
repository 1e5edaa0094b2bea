"""Options and output helpers shared by every command.

Print through these, never `print` or a Console of one's own: `out` (results, stdout) and
`err` (messages, stderr) show any text as it is and never wrap or cut it when piped;
`make_table` for tables, `print_verbatim` for code, `print_json` for `--json`.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

# Rich is imported where something is drawn: `--help` starts without it.
if TYPE_CHECKING:
    from rich.table import Table

from registry.errors import InputError

DbOption = Annotated[
    str | None,
    typer.Option(
        "--db",
        envvar="PRIORLEDGER_DB",
        metavar="URL_OR_PATH",
        help="Registry: a SQLAlchemy URL or a SQLite file path (default: ./priorledger.db).",
        show_default=False,
    ),
]
UserOption = Annotated[
    str | None,
    typer.Option(
        "--user",
        envvar="PRIORLEDGER_USER",
        metavar="NAME",
        help="Who makes this change (default: PRIORLEDGER_USER, else your login name).",
        show_default=False,
    ),
]
EncodingOption = Annotated[
    str | None,
    typer.Option(
        "--encoding",
        metavar="ENCODING",
        help="The file's text encoding if it is not UTF-8 (for example latin-1, cp1252).",
        show_default=False,
    ),
]
JsonOption = Annotated[
    bool, typer.Option("--json", help="Print exactly one JSON document on stdout.")
]


class _OnFirstUse:
    """`out` or `err`: a `registry.cli.console.PlainConsole`, made on first use, so that
    `--help`, `--version` and commands that print through neither start without Rich's
    console (a fifth of the start-up beyond Typer's own)."""

    def __init__(self, *, stderr: bool = False) -> None:
        self._stderr = stderr
        self._console: Any = None

    def _made(self) -> Any:
        if self._console is None:
            from registry.cli.console import PlainConsole

            self._console = PlainConsole(stderr=self._stderr)
        return self._console

    def __getattr__(self, name: str) -> Any:
        return getattr(self._made(), name)

    def print(self, *objects: Any, **options: Any) -> None:
        """Print as Rich does; tables off a terminal are written plain (`Listing`)."""
        stream = sys.stderr if self._stderr else sys.stdout
        tables = objects and all(isinstance(o, Listing) for o in objects)
        if tables and not options and not stream.isatty():
            stream.write("".join(o.plain() for o in objects))
            return
        self._made().print(*objects, **options)


out = _OnFirstUse()
err = _OnFirstUse(stderr=True)


def output_file(path: Path, option: str) -> Path:
    """A file to write, refused (InputError) when it is a folder or its folder is missing."""
    if path.is_dir():
        raise InputError(f"{path} is a folder; give a file name", field=option)
    if not path.parent.is_dir():
        raise InputError(f"folder {path.parent} does not exist", field=option)
    return path


def output_folder(path: Path, option: str) -> Path:
    """A folder to write into, made if missing; refused when a file is in the way."""
    try:
        path.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise InputError(f"cannot make folder {path}: {error.strerror}", field=option) from None
    return path


def print_json(doc: Any) -> None:
    sys.stdout.write(json.dumps(doc, indent=2, allow_nan=False) + "\n")


class Listing:
    """A table of text cells. On a terminal Rich draws it, long cells folding onto more lines
    instead of being cut; elsewhere (a pipe, a file) it is written as plain columns aligned
    with spaces, every cell whole, a header line first, without loading Rich: a listing of a
    thousand rows costs milliseconds, where Rich takes a good part of a second."""

    def __init__(self, *headers: str) -> None:
        self.headers = headers
        self.rows: list[tuple[str, ...]] = []

    def add_row(self, *cells: str) -> None:
        self.rows.append(tuple(str(cell) for cell in cells))

    def __rich__(self) -> Table:
        from rich.table import Column, Table

        table = Table(*(Column(header, overflow="fold") for header in self.headers))
        for row in self.rows:
            table.add_row(*row)
        return table

    def plain(self) -> str:
        """The columns padded to their widest cell, two spaces apart (the last not padded);
        a line break in a cell becomes a space, so that a row stays one line."""
        lines = [self.headers, *(tuple(" ".join(c.splitlines()) for c in r) for r in self.rows)]
        widths = [max(len(line[i]) for line in lines) for i in range(len(self.headers))]
        return "".join(
            "  ".join(cell.ljust(width) for cell, width in zip(line, widths, strict=True)).rstrip()
            + "\n"
            for line in lines
        )


def make_table(*headers: str) -> Listing:
    """A table for `out.print`: Rich's on a terminal, plain aligned columns elsewhere."""
    return Listing(*headers)


def print_verbatim(text: str) -> None:
    """Print text exactly as it is (emitted code): no markup, wrapping or tab expansion."""
    out.file.write(text if text.endswith("\n") else text + "\n")


def number(value: float | None, digits: int = 4) -> str:
    return "" if value is None else f"{value:.{digits}f}"


def ledger(db: str | None):  # type: ignore[no-untyped-def]
    from registry.storage.ledger import Ledger

    return Ledger.open(db)


def reading(db: str | None):  # type: ignore[no-untyped-def]
    """The registry's read queries for a command that only reads: on an up-to-date SQLite
    registry without loading SQLAlchemy (`registry.storage.readonly.reading`)."""
    from registry.storage.readonly import reading

    return reading(db)


# Options that select entries, shared by `entries` and `pool`.
DecimalCommaOption = Annotated[
    bool, typer.Option("--decimal-comma", help="Numbers are written with a decimal comma (0,15).")
]
CreateSourcesOption = Annotated[
    bool,
    typer.Option(
        "--create-sources/--known-sources",
        help="A source key not in the registry creates a source from the sheet's citation, "
        "doi and year (named on stderr), or, with --known-sources, is an error.",
    ),
]
SetOption = Annotated[
    list[str],
    typer.Option(
        "--set", metavar="FIELD=VALUE", help="An empty VALUE clears the field. Repeatable."
    ),
]
QuantityOption = Annotated[
    str | None, typer.Option("--quantity", metavar="QUANTITY", help="Only this quantity.")
]
MeasureOption = Annotated[
    str | None, typer.Option("--measure", metavar="MEASURE", help="Only this measure.")
]
TagOption = Annotated[
    list[str] | None,
    typer.Option(
        "--tag", metavar="TAG", help="Only entries with this tag (repeat for all of several)."
    ),
]
SourceOption = Annotated[
    list[str] | None,
    typer.Option("--source", metavar="KEY", help="Only entries from this source (repeatable)."),
]
IdOption = Annotated[
    list[int] | None, typer.Option("--id", metavar="ID", help="Only this entry (repeatable).")
]

# A listing shows this many rows unless asked for more, so that a registry of a million
# entries answers at once; the next page is `--offset`.
PAGE = 1000
LimitOption = Annotated[
    int,
    typer.Option("--limit", metavar="N", min=0, help="Show at most N rows (0: all)."),
]
OffsetOption = Annotated[
    int, typer.Option("--offset", metavar="N", min=0, help="Skip the first N rows.")
]


def page(rows: list[Any], limit: int, offset: int, what: str) -> tuple[list[Any], int | None]:
    """The rows of one page, fetched as `limit + 1` rows, and the next page's offset (None
    for the last page); says on stderr where the next page starts."""
    if not limit or len(rows) <= limit:
        return rows, None
    following = offset + limit
    err.print(
        f"note: {what} {offset + 1} to {following} shown; more follow "
        f"(--offset {following}, or --limit 0 for all)"
    )
    return rows[:limit], following


def option(name: str, metavar: str, text: str) -> Any:
    """A named option with a metavar a person would write, and no default shown."""
    return typer.Option(name, metavar=metavar, help=text, show_default=False)
