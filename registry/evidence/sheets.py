"""Reading extraction sheets (CSV or XLSX): one reported estimate a row.

This module only reads and validates; it knows nothing of the database. Rows are numbered
as a spreadsheet shows them (the header is row 1), so an error's row is the one the curator
sees. A bad cell raises `InputError` naming the file, row and column.

Numbers are read as papers print them: a p-value as an upper bound (`<0.001`), a proportion
or a level as a percentage (`15%`, `95%`), and with `decimal_comma` a comma as the decimal
point (`0,15`; never guessed: without it a comma in a number is an error). A CSV file whose
header is separated by semicolons and has no comma is read with `;` as the delimiter.

A row's identity (`SheetRow.fingerprint`) hashes its parsed numbers, each written in one
canonical form (`0.90`, `0.9` and `90%` of a proportion are one value), with its source,
study, quantity and measure: a CSV sheet and its XLSX copy give the same identities.
"""

from __future__ import annotations

import hashlib
import json
import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

from registry.errors import ConversionError, InputError
from registry.evidence.convert import NUMERIC_FIELDS, Derived, derive
from registry.evidence.reading import iter_grid
from registry.values.measures import MEASURES

REQUIRED = ("source", "quantity", "measure")
# Columns that describe the source rather than the entry; they fill in a new source.
SOURCE_FIELDS = ("citation", "doi", "year")
CONTEXT_FIELDS = (
    "design",
    "population",
    "setting",
    "intervention",
    "comparator",
    "outcome",
    "timepoint",
    "location",
    "extracted_by",
    "risk_of_bias",
    "notes",
)
TEXT_FIELDS = ("study", "tags", "row_key", *SOURCE_FIELDS, *CONTEXT_FIELDS)
COLUMNS = frozenset((*REQUIRED, *NUMERIC_FIELDS, *TEXT_FIELDS))
VOCABULARY = {
    "design": ("rct", "cohort", "case_control", "cross_sectional", "registry", "expert", "other"),
    "risk_of_bias": ("low", "some", "high"),
}
KEY_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.:/+-]*")
# json.dumps(..., sort_keys=True), without making an encoder for every row.
_CANONICAL_JSON = json.JSONEncoder(sort_keys=True)
# Columns that may be given as a percentage, by measure ("level" for every measure).
PERCENT_FIELDS: dict[str, tuple[str, ...]] = {
    "proportion": ("estimate", "lower", "upper", "se"),
    "risk_difference": ("estimate", "lower", "upper", "se"),
}


@dataclass(frozen=True)
class SheetRow:
    """One validated row: the cells as entered and what was derived from them."""

    row: int
    source: str
    study: str
    quantity: str
    measure: str
    reported: dict[str, str]
    derived: Derived
    context: dict[str, str] = field(default_factory=dict)
    source_info: dict[str, str] = field(default_factory=dict)
    tags: tuple[str, ...] = ()
    extra: dict[str, str] = field(default_factory=dict)
    fingerprint: str = ""
    row_key: str | None = None
    numbers: dict[str, str] = field(default_factory=dict)

    @property
    def cells(self) -> dict[str, str]:
        """The row's entry cells as entered (the form `EntryView.cells` has)."""
        return {**self.content, **self.reported}

    @property
    def content(self) -> dict[str, str]:
        """Every cell that makes up an entry, numbers in canonical form: what a revision
        changes (so `0.90` -> `0.9` is no change)."""
        return {
            "source": self.source,
            "study": self.study,
            "quantity": self.quantity,
            "measure": self.measure,
            **self.numbers,
            **self.context,
            **({"tags": ";".join(self.tags)} if self.tags else {}),
            **self.extra,
        }


def read_cells(
    path: Path,
    *,
    columns: frozenset[str] = COLUMNS,
    required: tuple[str, ...] = REQUIRED,
    decimal_comma: bool = False,
    encoding: str | None = None,
) -> Iterator[dict[str, str]]:
    """The sheet's data rows as column -> text, empty cells left out, one at a time."""
    grid = iter_grid(path, encoding, decimal_comma=decimal_comma)
    first = next(grid, None)
    if first is None:
        raise InputError("the sheet is empty", path=str(path))
    header = [h.strip().lower() for h in first]
    for name in header:
        if name and name not in columns and not name.startswith("x_"):
            raise InputError(
                "unknown column; prefix it with x_ to keep it as an extra",
                field=name,
                row=1,
                path=str(path),
            )
    missing = [name for name in required if name not in header]
    if missing:
        raise InputError("required column is missing", field=missing[0], row=1, path=str(path))
    duplicated = {h for h in header if h and header.count(h) > 1}
    if duplicated:
        raise InputError("column appears twice", field=sorted(duplicated)[0], row=1, path=str(path))
    for cells in grid:
        yield {h: c for h, c in zip(header, cells, strict=False) if h and c != ""}


def parse_number(
    text: str, name: str, measure: str, *, decimal_comma: bool = False
) -> tuple[float, bool]:
    """A numeric cell as a number, and whether it is an upper bound (`<0.001`, p only).

    A p-value may keep the printed `p`: `p<0.001`, `P = 0.03`.

    `15%` is 0.15 where `PERCENT_FIELDS` allows it; with `decimal_comma`, `0,15` is 0.15 and a
    point is refused (it could be a thousands separator).
    """
    body = text.strip().replace(" ", "")
    if name == "p":  # as printed: "p<0.001", "P = 0.03"
        body = re.sub(r"^[pP]=?", "", body)
    bound = body.startswith(("<", "≤"))
    if bound:
        if name != "p":
            raise InputError(
                f"only a p-value may be given as an inequality, got {text!r}", field=name
            )
        body = body.lstrip("<=≤")
    elif body.startswith(">"):
        raise InputError(
            f"{text!r} bounds the standard error from below only; report the interval or se",
            field=name,
        )
    if decimal_comma:
        if "." in body:
            raise InputError(f"with --decimal-comma a number has no '.', got {text!r}", field=name)
        body = body.replace(",", ".")
    elif "," in body:
        raise InputError(
            f"must be a number, got {text!r}; for decimal commas import with --decimal-comma",
            field=name,
        )
    percent = body.endswith("%")
    if percent and name != "level" and name not in PERCENT_FIELDS.get(measure, ()):
        raise InputError(
            f"a percentage is accepted for level and for a proportion, got {text!r}", field=name
        )
    try:
        value = float(body.removesuffix("%"))
    except ValueError:
        raise InputError(f"must be a number, got {text!r}", field=name) from None
    return (value / 100.0 if percent else value), bound


def canonical(value: float, bound: bool) -> str:
    """One text per number (`0.90`, `0.9`, `90%` -> `0.9`), `<` kept for a bound."""
    return ("<" if bound else "") + repr(value)


def identity(source: str, study: str, quantity: str, measure: str, numbers: dict[str, str]) -> str:
    """A row's identity: its canonical numbers with its source, study, quantity and measure.

    Independent of column order, of the file it came in and of how a spreadsheet wrote the
    numbers. Migration 0004 gives stored revisions their identity by this rule.
    """
    doc = {"source": source, "study": study, "quantity": quantity, "measure": measure}
    return hashlib.sha256(_CANONICAL_JSON.encode({**doc, **numbers}).encode()).hexdigest()


def parse_row(cells: dict[str, str], *, decimal_comma: bool = False, row: int = 0) -> SheetRow:
    """Validate one row's cells and derive its estimate; errors name the column (not the
    row: `row` is only stored on the result)."""
    for name in REQUIRED:
        if not cells.get(name):
            raise InputError("required value is empty", field=name)
    for name in ("source", "study"):
        if name in cells and not KEY_PATTERN.fullmatch(cells[name]):
            raise InputError(
                f"{cells[name]!r} is not a key: use letters, digits and _ . : / + -", field=name
            )
    if not KEY_PATTERN.fullmatch(cells["quantity"]):
        raise InputError(f"{cells['quantity']!r} is not a quantity key", field="quantity")
    measure = cells["measure"]
    if measure not in MEASURES:
        raise ConversionError(
            f"unknown measure {measure!r}; one of {', '.join(MEASURES)}", field="measure"
        )
    for name, allowed in VOCABULARY.items():
        if name in cells and cells[name] not in allowed:
            raise InputError(
                f"must be one of {', '.join(allowed)}, got {cells[name]!r}", field=name
            )
    if "year" in cells and not re.fullmatch(r"\d{4}", cells["year"]):
        raise InputError(f"must be a four-digit year, got {cells['year']!r}", field="year")
    if "row_key" in cells and not KEY_PATTERN.fullmatch(cells["row_key"]):
        raise InputError(f"{cells['row_key']!r} is not a key", field="row_key")
    numbers: dict[str, float] = {}
    bounds = set()
    for name in NUMERIC_FIELDS:
        if name in cells:
            numbers[name], bound = parse_number(
                cells[name], name, measure, decimal_comma=decimal_comma
            )
            if bound:
                bounds.add(name)
    derived = derive(measure, numbers, frozenset(bounds))
    tags = tuple(sorted({t.strip() for t in cells.get("tags", "").split(";") if t.strip()}))
    normal = {k: canonical(v, k in bounds) for k, v in numbers.items()}
    study = cells.get("study", cells["source"])
    return SheetRow(
        row=row,
        source=cells["source"],
        study=study,
        quantity=cells["quantity"],
        measure=measure,
        # as entered; a decimal comma is the sheet's notation, not the paper's
        reported={k: cells[k].replace(",", ".") if decimal_comma else cells[k] for k in numbers},
        derived=derived,
        context={k: cells[k] for k in CONTEXT_FIELDS if k in cells},
        source_info={k: cells[k] for k in SOURCE_FIELDS if k in cells},
        tags=tags,
        extra={k: v for k, v in cells.items() if k.startswith("x_")},
        fingerprint=identity(cells["source"], study, cells["quantity"], measure, normal),
        row_key=cells.get("row_key"),
        numbers=normal,
    )


def iter_sheet(
    path: str | Path, *, decimal_comma: bool = False, encoding: str | None = None
) -> Iterator[SheetRow]:
    """Every row of a sheet, validated, one at a time in sheet order (a large sheet is never
    held whole); the first bad cell raises with file, row and column.

    A `row_key` given on two rows is an error naming the second. Only a hash of each key is
    kept from row to row; a repeated hash is confirmed by reading the keys again.
    """
    path = Path(path)
    if not path.is_file():
        raise InputError("no such file", path=str(path))
    keys: set[int] = set()
    read = 0
    for number, cells in enumerate(
        read_cells(path, decimal_comma=decimal_comma, encoding=encoding), start=2
    ):
        if not cells:
            continue
        try:
            parsed = parse_row(cells, decimal_comma=decimal_comma, row=number)
        except InputError as error:
            raise error.located(path=str(path), row=number) from None
        if parsed.row_key is not None:
            if hash(parsed.row_key) in keys:
                _refuse_repeated_key(path, parsed.row_key, number, decimal_comma, encoding)
            keys.add(hash(parsed.row_key))
        read += 1
        yield parsed
    if not read:
        raise InputError("the sheet has no data rows", path=str(path))


def _refuse_repeated_key(
    path: Path, key: str, number: int, decimal_comma: bool, encoding: str | None
) -> None:
    """Raise if `key` is on a row before row `number` (else two keys only shared a hash)."""
    cells_by_row = read_cells(path, decimal_comma=decimal_comma, encoding=encoding)
    for earlier, cells in enumerate(cells_by_row, start=2):
        if earlier == number:
            return
        if cells.get("row_key") == key:
            raise InputError(
                f"row_key {key!r} is also on row {earlier}",
                field="row_key",
                row=number,
                path=str(path),
            )
