"""Opening the files a curator gives: bytes to text, and a CSV or XLSX sheet to a grid of cells.

Every way a file can fail to be read (missing, a folder, unreadable, not UTF-8, binary, a
corrupt or empty workbook, a cell too long, a row with more cells than the header) becomes
one `InputError` naming the file and, where there is one, the row. Text is UTF-8, with or
without a byte-order mark; another encoding is read only when the user names it.
"""

from __future__ import annotations

import codecs
import csv
import warnings
from collections.abc import Iterator
from pathlib import Path

from registry.errors import InputError

# The longest cell a CSV sheet may hold. csv's own limit (128 KiB) is raised so that long
# notes pass; a cell longer than this is no extraction but a broken file (an unclosed quote
# swallowing the rest of it, or data that is not a sheet).
MAX_CELL = 1024 * 1024
SHEET_SUFFIXES = (".csv", ".xlsx", ".xlsm")
_OTHER_UNICODE = {
    codecs.BOM_UTF32_LE: "UTF-32",
    codecs.BOM_UTF32_BE: "UTF-32",
    codecs.BOM_UTF16_LE: "UTF-16",
    codecs.BOM_UTF16_BE: "UTF-16",
}


def read_bytes(path: Path) -> bytes:
    try:
        return path.read_bytes()
    except OSError as error:
        raise InputError(f"cannot read it: {error.strerror or error}", path=str(path)) from None


def _line(data: bytes, offset: int) -> int:
    return data.count(b"\n", 0, offset) + 1


def decode(data: bytes, path: Path, encoding: str | None = None) -> str:
    """The text of a file: UTF-8 (a byte-order mark is dropped), or `encoding` if given."""
    where = str(path)
    if encoding is not None:
        try:
            codecs.lookup(encoding)
        except LookupError:
            raise InputError(f"unknown encoding {encoding!r}", field="--encoding") from None
    else:
        for mark, name in _OTHER_UNICODE.items():
            if data.startswith(mark):
                raise InputError(
                    f"the file is {name} (it starts with a {name} byte-order mark); save it as "
                    f"UTF-8 or give --encoding {name.lower()}",
                    path=where,
                )
    try:
        text = data.decode(encoding or "utf-8")
    except UnicodeDecodeError as error:
        byte = data[error.start]
        raise InputError(
            f"not {encoding or 'UTF-8'} text: byte 0x{byte:02x} on line "
            f"{_line(data, error.start)} cannot be decoded; save it as UTF-8"
            + ("" if encoding else " or give --encoding (for example --encoding latin-1)"),
            path=where,
        ) from None
    text = text.removeprefix("\ufeff")
    if "\x00" in text:
        raise InputError(
            f"line {text.count(chr(10), 0, text.index(chr(0))) + 1} holds a NUL character: "
            "this is not a text file",
            path=where,
        )
    return text


def read_text(path: Path, encoding: str | None = None) -> str:
    return decode(read_bytes(path), path, encoding)


def _lines(path: Path, encoding: str | None) -> Iterator[str]:
    """The lines of the file (already checked by `decode`), read and decoded a block at a
    time, line ends kept untranslated as the csv module needs: neither the file's bytes
    nor its text (as a StringIO, four bytes a character) is held while its rows are read."""
    with path.open(encoding=encoding or "utf-8", newline="") as stream:
        first = next(stream, None)
        if first is not None:
            yield first.removeprefix("\ufeff")
            yield from stream


def _csv_grid(path: Path, encoding: str | None) -> Iterator[list[str]]:
    # Every check of the text first, before any row is read; the text is not kept.
    first = read_text(path, encoding).partition("\n")[0]
    csv.field_size_limit(MAX_CELL)
    # Column names hold neither character, so the header shows the delimiter.
    delimiter = ";" if ";" in first and "," not in first else ","
    reader = csv.reader(_lines(path, encoding), delimiter=delimiter)
    try:
        for line in reader:
            yield [c.strip() for c in line]
    except csv.Error as error:
        problem = (
            f"a cell is longer than {MAX_CELL // 1024} KiB (an unclosed quote?)"
            if "field limit" in str(error)
            else f"not readable as CSV: {error}"
        )
        raise InputError(problem, row=reader.line_num, path=str(path)) from None


def _cell_text(value: object, decimal_comma: bool) -> str:
    if value is None:
        return ""
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    if isinstance(value, float) and decimal_comma:
        return repr(value).replace(".", ",")  # a number cell, written as the sheet's text is
    return str(value).strip()


def _xlsx_grid(path: Path, decimal_comma: bool) -> Iterator[list[str]]:
    from openpyxl import load_workbook

    # openpyxl warns about workbook features it skips (styles, data validation); they do
    # not change the cells read here, so they are not shown.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        try:
            workbook = load_workbook(path, read_only=True, data_only=True)
        except Exception as error:  # zipfile, XML and openpyxl errors alike: a broken file
            raise InputError(
                f"not a readable Excel workbook ({type(error).__name__}: "
                f"{' '.join(str(error).split()) or 'no detail'})",
                path=str(path),
            ) from None
        try:
            if not workbook.worksheets:
                raise InputError("the workbook has no worksheet", path=str(path))
            for values in workbook.worksheets[0].iter_rows(values_only=True):
                yield [_cell_text(v, decimal_comma) for v in values]
        except InputError:
            raise
        except Exception as error:
            raise InputError(
                f"the first worksheet cannot be read ({type(error).__name__}: {error})",
                path=str(path),
            ) from None
        finally:
            workbook.close()


def _checked_widths(grid: Iterator[list[str]], path: Path) -> Iterator[list[str]]:
    """The rows of `grid`, refusing a row with more filled cells than the header has
    columns: those cells would be dropped, and they usually come from a decimal comma or a
    thousands separator splitting one number into two cells."""
    header = next(grid, None)
    if header is None:
        return
    yield header
    width = max((i + 1 for i, name in enumerate(header) if name), default=0)
    for number, cells in enumerate(grid, start=2):
        extra = [i for i, cell in enumerate(cells[width:], start=width + 1) if cell]
        if extra:
            raise InputError(
                f"cell {extra[0]} ({cells[extra[0] - 1][:40]!r}) is beyond the {width} "
                "columns of the header; a decimal comma or a thousands separator outside "
                "quotes splits a number (write 0.5 and 1234)",
                row=number,
                path=str(path),
            )
        yield cells


def iter_grid(
    path: Path, encoding: str | None = None, *, decimal_comma: bool = False
) -> Iterator[list[str]]:
    """The cells of a .csv file (comma- or semicolon-separated, as its header shows) or of an
    .xlsx workbook's first sheet, as text, row by row, one row at a time (a sheet of a million
    rows is never held as a grid); with `decimal_comma`, a workbook's number cells are
    written with a decimal comma, as the sheet's text cells are."""
    suffix = path.suffix.lower()
    if suffix not in SHEET_SUFFIXES:
        raise InputError("an extraction sheet must be .csv or .xlsx", path=str(path))
    grid = _csv_grid(path, encoding) if suffix == ".csv" else _xlsx_grid(path, decimal_comma)
    return _checked_widths(grid, path)
