"""Options and output helpers shared by every command.

Print through these, never `print` or a Console of one's own: `out` (results, stdout) and
`err` (messages, stderr) show any text as it is and never wrap or cut it when piped;
`make_table` for tables, `print_verbatim` for code, `print_json` for `--json`.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Annotated, Any, Literal

import typer
from rich.cells import cell_len
from rich.console import Console, ConsoleDimensions, RenderableType
from rich.rule import Rule
from rich.status import Status
from rich.style import Style
from rich.table import Column, Table
from rich.text import Text

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

# Width of a console whose output is piped or redirected: wider than any real line, so that
# nothing is wrapped or cut, yet finite in case some renderable pads to the full width.
UNBOUNDED = 1_000_000
# A rule (a horizontal line) has no natural width, so off a terminal it gets this one.
RULE_WIDTH = 80


class PlainConsole(Console):
    """A Rich console for priorledger's output: text is never read as markup, and output that
    is not a terminal is never wrapped or truncated.

    Markup, emoji codes and highlighting are off, so a string is printed as it is, wherever
    it comes from (citations, notes, reasons, keys, tags); style goes in explicitly with
    `rich.text.Text` (for example `Text.assemble(("entry 3", "bold"), " revision 2")`).
    When the file is not a terminal the console is unboundedly wide, so table cells are shown
    in full and long lines stay whole; on a terminal the output is Rich's usual layout.
    """

    def __init__(self, *, stderr: bool = False) -> None:
        super().__init__(stderr=stderr, markup=False, emoji=False, highlight=False)

    @property
    def size(self) -> ConsoleDimensions:
        size = super().size
        return size if self.is_terminal else ConsoleDimensions(UNBOUNDED, size.height)

    def rule(
        self,
        title: str | Text = "",
        *,
        characters: str = "─",
        style: str | Style = "rule.line",
        align: Literal["left", "center", "right"] = "center",
    ) -> None:
        """A horizontal line with a title; off a terminal, as wide as a page, title in full."""
        line = Rule(title, characters=characters, style=style, align=align)
        if self.is_terminal:
            self.print(line)
        else:
            self.print(line, width=max(RULE_WIDTH, cell_len(str(title)) + 6))

    def status(self, status: RenderableType, **kwargs: Any) -> Status:
        """A spinner; its text is plain (Rich would read a string's brackets as markup)."""
        return super().status(Text(status) if isinstance(status, str) else status, **kwargs)


out = PlainConsole()
err = PlainConsole(stderr=True)


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


def make_table(*headers: str) -> Table:
    """A table whose long cells fold onto more lines on a terminal instead of being cut
    with an ellipsis, so that no key, DOI or name is ever shown in part."""
    return Table(*(Column(header, overflow="fold") for header in headers))


def print_verbatim(text: str) -> None:
    """Print text exactly as it is (emitted code): no markup, wrapping or tab expansion."""
    out.file.write(text if text.endswith("\n") else text + "\n")


def number(value: float | None, digits: int = 4) -> str:
    return "" if value is None else f"{value:.{digits}f}"


def ledger(db: str | None):  # type: ignore[no-untyped-def]
    from registry.storage.ledger import Ledger

    return Ledger.open(db)


# Options that select entries, shared by `entries` and `pool`.
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
