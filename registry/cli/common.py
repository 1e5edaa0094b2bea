"""Options and output helpers shared by every command."""

from __future__ import annotations

import json
import sys
from typing import Annotated, Any

import typer
from rich.console import Console

DbOption = Annotated[
    str | None,
    typer.Option(
        "--db",
        envvar="PRIORLEDGER_DB",
        help="Registry: a SQLAlchemy URL or a SQLite file path (default: ./priorledger.db).",
        show_default=False,
    ),
]
JsonOption = Annotated[
    bool, typer.Option("--json", help="Print exactly one JSON document on stdout.")
]

out = Console(highlight=False)
err = Console(stderr=True, highlight=False)


def print_json(doc: Any) -> None:
    sys.stdout.write(json.dumps(doc, indent=2, allow_nan=False) + "\n")


def number(value: float | None, digits: int = 4) -> str:
    return "" if value is None else f"{value:.{digits}f}"


def ledger(db: str | None):  # type: ignore[no-untyped-def]
    from registry.storage.ledger import Ledger

    return Ledger.open(db)


# Options that select entries, shared by `entries` and `pool`.
QuantityOption = Annotated[str | None, typer.Option("--quantity", help="Only this quantity.")]
MeasureOption = Annotated[str | None, typer.Option("--measure", help="Only this measure.")]
TagOption = Annotated[
    list[str] | None,
    typer.Option("--tag", help="Only entries with this tag (repeat for all of several)."),
]
SourceOption = Annotated[
    list[str] | None, typer.Option("--source", help="Only entries from this source (repeatable).")
]
IdOption = Annotated[list[int] | None, typer.Option("--id", help="Only this entry (repeatable).")]
