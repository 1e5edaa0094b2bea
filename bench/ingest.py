"""Throughput and peak memory of importing an extraction sheet, against a raw baseline.

    python bench/ingest.py [--rows 100000] [--xlsx]

Rows are invented: an odds ratio with its interval, a row key, a source among 50 and a note
on every row. Each step runs in a child process of its own, whose peak resident memory
(`getrusage` of that child, as `/usr/bin/time -f %M` gives it) is printed beside its time:

- `priorledger import`: `Ledger.import_sheet` into a new SQLite registry, which reads,
  validates and converts every row, and stores entries, revisions, sources and studies;
- the same sheet again (every row present), and a keyed re-import that revises every tenth
  row (both against the registry of the first import); with `--xlsx`, the sheet's XLSX copy
  (slow to write for large sheets, so off by default);
- raw baseline: the same CSV read with the `csv` module and written with plain `sqlite3`
  `executemany` in one transaction (WAL journal, as the registry) into one table holding
  the columns an entry and its revision hold: id, fingerprint (SHA-256 of the row's cells),
  row_key, revision (1), source, study (the source), quantity, measure, reported (JSON of
  estimate, lower, upper as text), y and se (estimate and upper as floats: no validation,
  no conversion), scale, conversion, identity (the fingerprint), corrections ("[]"),
  context (JSON of the note), extra ("{}"), reason, created_at, created_by; with the
  indexes the registry keeps on entries and revisions: unique fingerprint, unique row_key,
  unique (id, revision), identity, quantity, measure, (quantity, id, revision),
  (source, id).

The ratio is our rows per second over the baseline's (issue 13 asks for at least 0.30).
Figures only; nothing is asserted.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import json
import os
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HEADER = ["row_key", "source", "quantity", "measure", "estimate", "lower", "upper", "notes"]
_RAW_SCHEMA = """
CREATE TABLE rows (
    id INTEGER PRIMARY KEY, fingerprint TEXT NOT NULL UNIQUE, row_key TEXT UNIQUE,
    revision INTEGER NOT NULL, source TEXT NOT NULL, study TEXT NOT NULL,
    quantity TEXT NOT NULL, measure TEXT NOT NULL, reported TEXT NOT NULL, y REAL, se REAL,
    scale TEXT, conversion TEXT, identity TEXT, corrections TEXT, context TEXT, extra TEXT,
    reason TEXT, created_at TEXT, created_by TEXT
);
CREATE UNIQUE INDEX rows_id_revision ON rows (id, revision);
CREATE INDEX rows_identity ON rows (identity);
CREATE INDEX rows_quantity ON rows (quantity);
CREATE INDEX rows_measure ON rows (measure);
CREATE INDEX rows_quantity_id ON rows (quantity, id, revision);
CREATE INDEX rows_source_id ON rows (source, id);
"""


def write(path: Path, rows: int, shift_every: int = 0) -> Path:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(HEADER)
        for i in range(rows):
            upper = "2.10" if shift_every and i % shift_every == 0 else "2.00"
            writer.writerow(
                [f"k{i}", f"s{i % 50}", f"q{i}", "odds_ratio", "1.40", "0.90", upper, "Table 2"]
            )
    return path


def write_xlsx(source: Path, path: Path) -> Path:
    from openpyxl import Workbook

    book = Workbook(write_only=True)
    sheet = book.create_sheet()
    with source.open(newline="") as handle:
        for n, row in enumerate(csv.reader(handle)):
            sheet.append(row if n == 0 else [float(c) if c[:1].isdigit() else c for c in row])
    book.save(path)
    return path


def raw(sheet: Path, database: Path) -> int:
    """The baseline (see the module docstring); the number of rows written."""
    connection = sqlite3.connect(database, isolation_level=None)
    connection.execute("PRAGMA journal_mode = WAL")
    connection.executescript(_RAW_SCHEMA)
    now = time.strftime("%Y-%m-%dT%H:%M:%S")
    with sheet.open(newline="") as handle:
        reader = csv.reader(handle)
        header = next(reader)

        def records():  # type: ignore[no-untyped-def]
            for n, cells in enumerate(reader, start=2):
                row = dict(zip(header, cells, strict=True))
                print_ = hashlib.sha256("\x1f".join(cells).encode()).hexdigest()
                reported = json.dumps({k: row[k] for k in ("estimate", "lower", "upper")})
                yield (
                    print_, row["row_key"], 1, row["source"], row["source"], row["quantity"],
                    row["measure"], reported, float(row["estimate"]), float(row["upper"]),
                    "log", "ci_log", print_, "[]", json.dumps({"notes": row["notes"]}), "{}",
                    f"imported from {sheet.name} row {n}", now, "bench",
                )  # fmt: skip

        connection.execute("BEGIN IMMEDIATE")
        connection.executemany(
            "INSERT INTO rows (fingerprint, row_key, revision, source, study, quantity, "
            "measure, reported, y, se, scale, conversion, identity, corrections, context, "
            "extra, reason, created_at, created_by) "
            "VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            records(),
        )
        connection.execute("COMMIT")
    (count,) = connection.execute("SELECT count(*) FROM rows").fetchone()
    connection.close()
    return count


def step(kind: str, sheet: Path, database: Path) -> tuple[float, str]:
    """One step, run in this (child) process: seconds of the import call, and a summary.
    Opening (and for the first import migrating) the registry is not timed."""
    if kind == "raw":
        start = time.perf_counter()
        count = raw(sheet, database)
        return time.perf_counter() - start, f"{count} rows"
    from registry.storage.ledger import Ledger

    ledger = Ledger.open(str(database))
    start = time.perf_counter()
    report = ledger.import_sheet(sheet, create_sources=True)
    seconds = time.perf_counter() - start
    return seconds, ", ".join(f"{a} {report.plan.count(a)}" for a in ("add", "revise", "present"))


def child(kind: str, sheet: Path, database: Path) -> tuple[float, str, int]:
    """Seconds, summary and peak resident memory (KiB) of `step` in a child process."""
    process = subprocess.Popen(
        [sys.executable, __file__, "--step", kind, str(sheet), str(database)],
        stdout=subprocess.PIPE,
        text=True,
    )
    assert process.stdout is not None
    output = process.stdout.read()
    _, status, usage = os.wait4(process.pid, 0)
    process.returncode = os.waitstatus_to_exitcode(status)
    if process.returncode:
        sys.exit(f"{kind} failed with exit code {process.returncode}")
    seconds, summary = output.strip().split("\t")
    return float(seconds), summary, usage.ru_maxrss  # KiB on Linux


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--rows", type=int, default=100_000)
    parser.add_argument("--xlsx", action="store_true", help="also import the sheet's XLSX copy")
    parser.add_argument(
        "--reimports",
        action=argparse.BooleanOptionalAction,
        default=True,
        help="also time the same sheet again and the keyed re-import",
    )
    parser.add_argument("--step", nargs=3, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.step:
        kind, sheet, database = args.step
        seconds, summary = step(kind, Path(sheet), Path(database))
        print(f"{seconds:.3f}\t{summary}")
        return
    rows = args.rows
    with tempfile.TemporaryDirectory() as folder:
        tmp = Path(folder)
        sheet = write(tmp / "s.csv", rows)
        print(f"{rows} rows, {sheet.stat().st_size / 2**20:.1f} MiB of CSV")
        steps = [
            ("priorledger import", "first", sheet, tmp / "registry.db"),
            ("same sheet again", "again", sheet, tmp / "registry.db"),
            ("keyed re-import, every tenth row revised", "keyed",
             write(tmp / "fixed.csv", rows, shift_every=10), tmp / "registry.db"),
            ("raw csv + sqlite3 executemany", "raw", sheet, tmp / "raw.db"),
        ]  # fmt: skip
        if not args.reimports:
            del steps[1:3]
        if args.xlsx:
            xlsx = write_xlsx(sheet, tmp / "s.xlsx")
            steps.insert(2, ("its XLSX copy", "xlsx", xlsx, tmp / "registry.db"))
        speed = {}
        for label, kind, path, database in steps:
            seconds, summary, peak = child(kind, path, database)
            speed[kind] = rows / seconds
            print(
                f"{label:<42} {seconds:8.2f} s {rows / seconds:9.0f} rows/s "
                f"{peak / 1024:7.0f} MiB peak   {summary}"
            )
        print(f"ours / raw throughput: {speed['first'] / speed['raw']:.2f} (goal at least 0.30)")


if __name__ == "__main__":
    main()
