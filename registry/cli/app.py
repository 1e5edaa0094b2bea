"""The `priorledger` command: a thin Typer layer over the library.

Every way a run can end is decided here, in one place (`main`): library errors and usage
errors become one line on stderr and exit code 2 (1 for a failed check); anything else is a
bug, whose traceback goes to a file that a one-line message names, with exit code `BUG_EXIT`.
"""

from __future__ import annotations

import os
import sys
import time
import warnings
from pathlib import Path
from typing import Annotated

import typer

# Typer carries its own copy of Click; these are the exceptions it raises for bad usage.
from typer._click.exceptions import ClickException, NoArgsIsHelpError
from typer.core import TyperArgument, TyperCommand, TyperGroup

from registry import __version__
from registry.cli import (
    check_cmds,
    demo_cmd,
    design_cmd,
    elicit_cmd,
    pool_cmd,
    prior_cmds,
    registry_cmds,
    report_cmds,
)
from registry.errors import LedgerError

app = typer.Typer(
    name="priorledger",
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    add_completion=False,
    # Click's plain help: Typer's Rich help loads Markdown and Pygments (most of the cost of
    # `--help`, issue 13 goal 3) for formatting the help text does not use.
    rich_markup_mode=None,
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
    """Keep published evidence with its provenance and build traceable priors from it.

    Example: priorledger demo
    """


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
for command in (check_cmds.predict, check_cmds.update, check_cmds.sensitivity):
    app.command(command.__name__)(command)
app.command("design")(design_cmd.design)
app.command("elicit")(elicit_cmd.elicit)
app.command("report")(report_cmds.report)
app.command("diff")(report_cmds.diff)


# EX_SOFTWARE of BSD's sysexits.h, "an internal software error": a bug in priorledger.
BUG_EXIT = 70
USAGE_EXIT = 2
# What a shell reports for a run stopped by Ctrl-C (128 + SIGINT).
INTERRUPTED_EXIT = 130


def _no_type(ctx: typer.Context) -> None:
    return None


def _person_metavars(command: TyperCommand | TyperGroup) -> None:
    """Make `--help` show what a person writes, never a Python type such as `<bool>`.

    Typer prints a type beside every parameter: for a flag (including `--help`) that is
    `<bool>`, and for an argument it is printed even when the argument has a metavar (its
    name column already shows the metavar, FILE or ID). Options are given explicit metavars
    where they are declared.
    """
    for param in (*command.params, command.get_help_option(typer.Context(command))):
        if isinstance(param, TyperArgument):
            param.display_type_rich = _no_type  # type: ignore[method-assign]
        elif param is not None and param.is_flag:
            param.metavar = ""
    for sub in getattr(command, "commands", {}).values():
        _person_metavars(sub)


def _one_line(text: str) -> str:
    return " ".join(text.splitlines())


def _write_crash_report(error: Exception) -> str:
    """Write the full traceback to a new file in the system's temporary folder; say where.

    The file is readable by its owner only: a traceback can show paths and database URLs.
    """
    import tempfile
    import traceback

    stamp = time.strftime("%Y%m%dT%H%M%S")
    path = Path(tempfile.gettempdir()) / f"priorledger-crash-{stamp}-{os.getpid()}.txt"
    report = f"priorledger {__version__}, Python {sys.version.split()[0]}\n\n" + "".join(
        traceback.format_exception(error)
    )
    try:
        with os.fdopen(os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600), "w") as f:
            f.write(report)
    except OSError as failed:
        # Nowhere to write it: the traceback goes to stderr rather than being lost.
        sys.stderr.write(report)
        return f"the traceback is printed above (it could not be written to {path}: {failed})"
    return f"the full traceback is in {path}"


def _warning_line(message: Warning | str, *_where: object, **_file: object) -> None:
    """A warning of a library underneath as one line on stderr (Python's own form adds the
    file, line and source text on a second line). Warnings that do not matter to the user
    are silenced where they arise (for example openpyxl's, in registry/evidence/reading.py)."""
    print(f"warning: {_one_line(str(message))}", file=sys.stderr)


def main() -> None:
    """Entry point: run the command and turn every way it can fail into one line and a code.

    Exit codes (the README's contract): 0 success; 1 a check that was asked for failed;
    2 bad input or usage; 70 a bug (an unexpected exception); 130 interrupted.
    """
    warnings.showwarning = _warning_line
    try:
        command = typer.main.get_command(app)
        _person_metavars(command)
        code = command.main(prog_name="priorledger", standalone_mode=False)
    except LedgerError as error:
        print(f"error: {_one_line(str(error))}", file=sys.stderr)
        sys.exit(error.exit_code)
    except NoArgsIsHelpError:
        sys.exit(USAGE_EXIT)  # the help has been printed already
    except ClickException as error:
        context = getattr(error, "ctx", None)
        hint = f" (see: {context.command_path} --help)" if context is not None else ""
        print(f"error: {_one_line(error.format_message())}{hint}", file=sys.stderr)
        sys.exit(USAGE_EXIT)
    except typer.Abort:
        print("aborted", file=sys.stderr)
        sys.exit(INTERRUPTED_EXIT)
    except Exception as error:
        where = _write_crash_report(error)
        print(
            f"internal error (a bug in priorledger {__version__}, please report it): "
            f"{type(error).__name__}: {_one_line(str(error))}; {where}",
            file=sys.stderr,
        )
        sys.exit(BUG_EXIT)
    sys.exit(code if isinstance(code, int) else 0)
