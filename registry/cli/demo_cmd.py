"""`priorledger demo`: the whole job on the invented scenario, in one command."""

from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Annotated

import typer

from registry.cli.common import CAUTION, err, ledger, out
from registry.cli.registry_cmds import entries_table


def demo(
    db: Annotated[
        str | None,
        typer.Option("--db", help="Registry to build the demo in (default: a new temporary file)."),
    ] = None,
    out_dir: Annotated[
        Path | None,
        typer.Option("--out", help="Folder for the demo's figures (default: beside the registry)."),
    ] = None,
) -> None:
    """Build a registry from the invented demo scenario and show what it holds.

    Example: priorledger demo
    """
    from registry.demo import load_seed

    if db is None:
        db = str(Path(tempfile.mkdtemp(prefix="priorledger-demo-")) / "demo.db")
    registry = ledger(db)
    out.print(
        "[bold]priorledger demo[/bold]: an INVENTED scenario (fictitious studies, "
        "numbers and DOIs) of a community physiotherapy network planning a "
        "balance-training trial for older adults."
    )
    out.print(f"registry: {registry.url}")
    loaded = load_seed(registry)
    out.print(
        f"loaded {len(loaded.sources.added)} sources and "
        f"{len(loaded.sheet.added)} entries "
        f"({loaded.sheet.skipped} already present)"
    )
    out.print(entries_table(registry.entries()))
    err.print(CAUTION)
