"""Listings and look-ups at a million entries (issue 13, goal 2), each beside the start-up of
`priorledger --version`, as a ratio measured in the same run.

The registry is made without the import path: the migrated schema (with the demo's sources,
entries and both demo priors built through the library), then INVENTED bench rows written
with raw `sqlite3` executemany: sources, one study an entry, entries with a revision each
(2% with a second), a tag on every entry (a common one on 30%). Run with the project
installed:
    python bench/listings.py [--entries 1000000] [--runs 3] [--db FILE]
A --db that exists is reused as it is.
"""

from __future__ import annotations

import argparse
import json
import math
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

QUANTITIES = 2000
SOURCES = 20_000
BATCH = 50_000
STAMP = "2026-12-02 00:00:00.000000"
COMMON_TAG = "bench-common"


def _seed(path: Path) -> None:
    """The migrated schema with the demo's data and priors, through the library."""
    from registry.demo import DEFINITIONS, load_seed, seed_path
    from registry.priors.definition import load_definition
    from registry.priors.store import build_prior
    from registry.storage.ledger import Ledger

    ledger = Ledger.open(str(path))
    load_seed(ledger)
    for name in DEFINITIONS:
        build_prior(ledger, load_definition(seed_path(name)))
    ledger.engine.dispose()


def _revision(rev_id: int, entry: int, number: int, source: int, study: int) -> tuple:
    events, total = 5 + entry % 90, 200 + entry % 700
    p = events / total
    y = math.log(p / (1 - p))
    se = math.sqrt(1 / events + 1 / (total - events))
    return (
        rev_id,
        entry,
        number,
        source,
        study,
        f"bench-q{entry % QUANTITIES}",
        "proportion",
        json.dumps({"events": str(events), "total": str(total)}),
        y,
        se,
        "logit",
        "logit of events/total",
        "[]",
        "{}",
        "{}",
        "INVENTED bench row" if number == 1 else "INVENTED correction",
        STAMP,
    )


def generate(path: Path, n: int) -> None:
    """Write n INVENTED entries into the migrated registry at `path` with executemany."""
    _seed(path)
    con = sqlite3.connect(path)
    cur = con.cursor()
    base = {
        table: cur.execute(f"SELECT coalesce(max(id), 0) FROM {table}").fetchone()[0]
        for table in ("sources", "studies", "entries", "entry_revisions")
    }
    cur.executemany(
        "INSERT INTO sources (id, key, citation, year, retracted, created_at) "
        "VALUES (?, ?, ?, ?, 0, ?)",
        (
            (
                base["sources"] + i,
                f"bench{i:05d}",
                f"INVENTED bench source {i}",
                2000 + i % 25,
                STAMP,
            )
            for i in range(1, SOURCES + 1)
        ),
    )
    rev_id = base["entry_revisions"]
    for start in range(1, n + 1, BATCH):
        ids = range(start, min(start + BATCH, n + 1))
        entry_ids = [base["entries"] + i for i in ids]
        cur.executemany(
            "INSERT INTO studies (id, key, created_at) VALUES (?, ?, ?)",
            ((base["studies"] + i, f"bench-study-{i}", STAMP) for i in ids),
        )
        cur.executemany(
            "INSERT INTO entries (id, fingerprint, row, created_at) VALUES (?, ?, ?, ?)",
            ((e, f"bench-{e:064d}"[-64:], e, STAMP) for e in entry_ids),
        )
        revisions, tags = [], []
        for i, e in zip(ids, entry_ids, strict=True):
            source, study = base["sources"] + 1 + i % SOURCES, base["studies"] + i
            for number in (1, 2) if i % 50 == 0 else (1,):
                rev_id += 1
                revisions.append(_revision(rev_id, e, number, source, study))
                tags.append((rev_id, COMMON_TAG if i % 10 < 3 else f"bench-tag{i % 100}"))
        cur.executemany(
            "INSERT INTO entry_revisions (id, entry_id, revision, source_id, study_id, quantity, "
            "measure, reported, y, se, scale, conversion, corrections, context, extra, reason, "
            "created_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            revisions,
        )
        cur.executemany("INSERT INTO entry_tags (revision_id, tag) VALUES (?, ?)", tags)
    con.commit()
    con.close()


def median_s(command: list[str], runs: int) -> float:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        subprocess.run(command, capture_output=True, check=True)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--entries", type=int, default=1_000_000)
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--db", type=Path, default=None)
    args = parser.parse_args()
    command = shutil.which("priorledger")
    if command is None:
        sys.exit("install the project first: python -m pip install -e .")
    path = args.db or Path(tempfile.mkdtemp()) / "bench.db"
    if not path.exists():
        start = time.perf_counter()
        generate(path, args.entries)
        print(f"generated {args.entries} entries in {time.perf_counter() - start:.1f} s: {path}")
    db = ["--db", str(path)]
    cases = {
        "entries --quantity Q": ["entries", "--quantity", "bench-q7", *db],
        "entries --quantity Q --json": ["entries", "--quantity", "bench-q7", "--json", *db],
        "entries --tag T (common)": ["entries", "--tag", COMMON_TAG, *db],
        "sources": ["sources", *db],
        "prior": ["prior", "falls-programme-effect", *db],
        "trace": ["trace", "falls-programme-effect", *db],
        "pool --quantity Q": ["pool", "--quantity", "bench-q7", *db],
    }
    version = median_s([command, "--version"], args.runs)
    print(f"{'command':<30}{'median s':>10}{'ratio':>8}   (goal: ratio <= 3)")
    print(f"{'priorledger --version':<30}{version:>10.3f}{1.0:>8.2f}")
    for label, arguments in cases.items():
        seconds = median_s([command, *arguments], args.runs)
        print(f"{label:<30}{seconds:>10.3f}{seconds / version:>8.2f}")


if __name__ == "__main__":
    main()
