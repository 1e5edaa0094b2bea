"""The `priorledger` command: a thin Typer layer over the library.

Errors of the library's family become one line on stderr and their exit code here, in one
place; anything else is a bug and keeps its traceback.
"""

from __future__ import annotations

import sys
from typing import Annotated

import typer

from registry import __version__
from registry.cli import demo_cmd, pool_cmd, prior_cmds, registry_cmds
from registry.errors import LedgerError

app = typer.Typer(
    name="priorledger",
    help="Keep published evidence with its provenance and build traceable priors from it.",
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=False,
)


def _version(value: bool) -> None:
    if value:
        typer.echo(f"priorledger {__version__}")
        raise typer.Exit()


@app.callback()
def _root(
    version: Annotated[
        bool | None,
        typer.Option("--version", callback=_version, is_eager=True, help="Show the version."),
    ] = None,
) -> None:
    """Keep published evidence with its provenance and build traceable priors from it."""


app.command("init")(registry_cmds.init)
app.command("import")(registry_cmds.import_sheet)
app.add_typer(registry_cmds.sources_app, name="sources")
app.add_typer(registry_cmds.entries_app, name="entries")
app.command("revise")(registry_cmds.revise)
app.command("pool")(pool_cmd.pool)
for command in (
    prior_cmds.build,
    prior_cmds.priors,
    prior_cmds.prior,
    prior_cmds.verify,
    prior_cmds.trace,
    prior_cmds.emit,
):
    app.command(command.__name__)(command)
app.command("demo")(demo_cmd.demo)


def main() -> None:
    """Entry point: Typer handles usage errors (exit 2); library errors are turned here."""
    try:
        app()
    except LedgerError as error:
        print(f"error: {error}", file=sys.stderr)
        sys.exit(error.exit_code)
