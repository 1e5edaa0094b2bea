"""Reading extraction sheets (CSV or XLSX): one reported estimate a row.

This module only reads and validates; it knows nothing of the database. Rows are numbered
as a spreadsheet shows them (the header is row 1), so an error's row is the one the curator
sees. A bad cell raises `InputError` naming the file, row and column.
"""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass, field, replace
from pathlib import Path

from registry.errors import ConversionError, InputError
from registry.evidence.convert import NUMERIC_FIELDS, Derived, derive
from registry.evidence.reading import read_grid
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
TEXT_FIELDS = ("study", "tags", *SOURCE_FIELDS, *CONTEXT_FIELDS)
COLUMNS = frozenset((*REQUIRED, *NUMERIC_FIELDS, *TEXT_FIELDS))
VOCABULARY = {
    "design": ("rct", "cohort", "case_control", "cross_sectional", "registry", "expert", "other"),
    "risk_of_bias": ("low", "some", "high"),
}
KEY_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.:/+-]*")


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


def read_cells(path: Path, encoding: str | None = None) -> list[dict[str, str]]:
    """The sheet's data rows as column -> text, empty cells left out."""
    grid = read_grid(path, encoding)
    if not grid:
        raise InputError("the sheet is empty", path=str(path))
    header = [h.strip().lower() for h in grid[0]]
    for name in header:
        if name and name not in COLUMNS and not name.startswith("x_"):
            raise InputError(
                "unknown column; prefix it with x_ to keep it as an extra",
                field=name,
                row=1,
                path=str(path),
            )
    missing = [name for name in REQUIRED if name not in header]
    if missing:
        raise InputError("required column is missing", field=missing[0], row=1, path=str(path))
    duplicated = {h for h in header if h and header.count(h) > 1}
    if duplicated:
        raise InputError("column appears twice", field=sorted(duplicated)[0], row=1, path=str(path))
    rows = []
    for cells in grid[1:]:
        rows.append({h: c for h, c in zip(header, cells, strict=False) if h and c != ""})
    return rows


def fingerprint(cells: dict[str, str]) -> str:
    """A hash of a row's cells, independent of column order and of the file it came in."""
    return hashlib.sha256(json.dumps(cells, sort_keys=True).encode()).hexdigest()


def parse_row(cells: dict[str, str]) -> SheetRow:
    """Validate one row's cells and derive its estimate; errors name the column (no row)."""
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
    numbers: dict[str, float] = {}
    for name in NUMERIC_FIELDS:
        if name in cells:
            try:
                numbers[name] = float(cells[name])
            except ValueError:
                raise InputError(f"must be a number, got {cells[name]!r}", field=name) from None
    derived = derive(measure, numbers)
    tags = tuple(sorted({t.strip() for t in cells.get("tags", "").split(";") if t.strip()}))
    return SheetRow(
        row=0,
        source=cells["source"],
        study=cells.get("study", cells["source"]),
        quantity=cells["quantity"],
        measure=measure,
        reported={k: cells[k] for k in NUMERIC_FIELDS if k in cells},
        derived=derived,
        context={k: cells[k] for k in CONTEXT_FIELDS if k in cells},
        source_info={k: cells[k] for k in SOURCE_FIELDS if k in cells},
        tags=tags,
        extra={k: v for k, v in cells.items() if k.startswith("x_")},
        fingerprint=fingerprint(cells),
    )


def read_sheet(path: str | Path, *, encoding: str | None = None) -> list[SheetRow]:
    """Every row of a sheet, validated; the first bad cell raises with file, row and column."""
    path = Path(path)
    if not path.is_file():
        raise InputError("no such file", path=str(path))
    rows = []
    for number, cells in enumerate(read_cells(path, encoding), start=2):
        if not cells:
            continue
        try:
            parsed = parse_row(cells)
        except InputError as error:
            raise error.located(path=str(path), row=number) from None
        rows.append(replace(parsed, row=number))
    if not rows:
        raise InputError("the sheet has no data rows", path=str(path))
    return rows
