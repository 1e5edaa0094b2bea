"""Time of importing an extraction sheet: first import, the same sheet again (every row
present), its XLSX copy, and a keyed re-import that revises every tenth row; and of
fitting an elicitation sheet. Rows are invented.
    python bench/ingest.py [--rows 2000]
"""

from __future__ import annotations

import argparse
import csv
import tempfile
import time
from pathlib import Path

from registry.storage.ledger import Ledger

HEADER = ["row_key", "source", "quantity", "measure", "estimate", "lower", "upper", "notes"]


def write(path: Path, rows: int, shift_every: int = 0) -> Path:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(HEADER)
        for i in range(rows):
            upper = "2.10" if shift_every and i % shift_every == 0 else "2.00"
            writer.writerow(
                [f"k{i}", f"s{i % 50}", f"q{i}", "odds_ratio", "1.40", "0.90", upper, ""]
            )
    return path


def write_xlsx(source: Path, path: Path) -> Path:
    from openpyxl import Workbook

    book = Workbook()
    sheet = book.active
    with source.open(newline="") as handle:
        for n, row in enumerate(csv.reader(handle)):
            sheet.append(row if n == 0 else [float(c) if c[:1].isdigit() else c for c in row])
    book.save(path)
    return path


def summary(report: object) -> str:
    counts = {a: len(report.planned(a)) for a in ("add", "revise", "present")}  # type: ignore[attr-defined]
    return ", ".join(f"{k} {v}" for k, v in counts.items())


def timed(label: str, call) -> None:  # type: ignore[no-untyped-def]
    start = time.perf_counter()
    report = call()
    print(f"{label:<42} {time.perf_counter() - start:8.2f} s   {report}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rows", type=int, default=2000)
    rows = parser.parse_args().rows
    with tempfile.TemporaryDirectory() as folder:
        tmp = Path(folder)
        ledger = Ledger.open(str(tmp / "bench.db"))
        sheet = write(tmp / "s.csv", rows)
        timed(
            f"first import, {rows} rows",
            lambda: summary(ledger.import_sheet(sheet, create_sources=True)),
        )
        timed("same sheet again", lambda: summary(ledger.import_sheet(sheet)))
        xlsx = write_xlsx(sheet, tmp / "s.xlsx")
        timed("its XLSX copy", lambda: summary(ledger.import_sheet(xlsx)))
        fixed = write(tmp / "fixed.csv", rows, shift_every=10)
        timed(
            "keyed re-import, every tenth row revised", lambda: summary(ledger.import_sheet(fixed))
        )


if __name__ == "__main__":
    main()
