"""The one exception family of priorledger.

The library raises these; the CLI turns each into a one-line message and an exit code in
exactly one place (`registry.cli.app.main`). Nothing else is caught there, so any other
exception is a bug and shows its traceback.
"""

from __future__ import annotations


class LedgerError(Exception):
    """Base of every error the library raises on purpose. Exit code 2 unless overridden."""

    exit_code = 2


class InputError(LedgerError):
    """Bad input from a file or an option: names where it is (file, row, field) and why.

    `field` is the column, key or option at fault; `row` is the spreadsheet row number
    (the header is row 1) or the line of a definition file; `path` is the file.
    """

    def __init__(
        self,
        message: str,
        *,
        field: str | None = None,
        row: int | None = None,
        path: str | None = None,
    ) -> None:
        super().__init__(message)
        self.message = message
        self.field = field
        self.row = row
        self.path = path

    def located(self, *, path: str | None = None, row: int | None = None) -> InputError:
        """A copy that also says which file and row the problem is in."""
        return InputError(
            self.message,
            field=self.field,
            row=self.row if row is None else row,
            path=self.path if path is None else path,
        )

    def __str__(self) -> str:
        where = []
        if self.path:
            where.append(self.path)
        if self.row is not None:
            where.append(f"row {self.row}")
        if self.field:
            where.append(f"column '{self.field}'" if self.row is not None else f"'{self.field}'")
        return (", ".join(where) + ": " if where else "") + self.message


class ConversionError(InputError):
    """Reported numbers that cannot be turned into an estimate and standard error."""


class NotFoundError(LedgerError):
    """A named thing (entry, source, prior) is not in the registry."""


class NumericalError(LedgerError):
    """A computation could not be done reliably; the message says what to try next."""


class CheckFailed(LedgerError):
    """A check the user asked for ran and found a problem (exit code 1)."""

    exit_code = 1


class ConflictError(LedgerError):
    """A write kept losing races to other writers and was given up; nothing was written."""
