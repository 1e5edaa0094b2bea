"""Many curators at once: concurrent imports, builds, revisions and retractions against one
registry (SQLite and PostgreSQL) each succeed or report a conflict in one line; SIGKILL in
the middle of an import or a build leaves nothing partial.

Every writer is a separate `priorledger` process, as in a team. Sizes are kept small so that
the whole file runs in about a minute per back end on two cores.
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path

from sqlalchemy import func, select, text

from registry.storage.ledger import Ledger
from registry.storage.models import Entry, EntryRevision, PriorEntry, PriorVersion
from tests.conftest import simple_definition, write_sheet

PROCESSES = 8
HEADER = ["source", "quantity", "measure", "estimate", "lower", "upper"]
DEFINITION = simple_definition("race-prior", "q0", parameter="log risk ratio, variant {k}")


def command(*args: object) -> list[str]:
    return [sys.executable, "-c", "from registry.cli.app import main; main()", *map(str, args)]


def run_all(commands: Sequence[list[str]]) -> list[subprocess.CompletedProcess[str]]:
    """Start every command at once, then wait for them all."""
    env = {**os.environ, "NO_COLOR": "1"}
    started = [
        subprocess.Popen(c, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
        for c in commands
    ]
    done = []
    for process, args in zip(started, commands, strict=True):
        out, err = process.communicate(timeout=300)
        done.append(subprocess.CompletedProcess(args, process.returncode, out, err))
    return done


def rows_of(round_: int) -> list[list[object]]:
    """24 distinct invented rows for one round, from 6 sources none of which exists yet."""
    return [
        [f"src{round_}-{i % 6}", f"q{round_}", "risk_ratio", 0.5 + i / 100, 0.3, 0.9 + i / 100]
        for i in range(24)
    ]


def overlapping_sheets(folder: Path, round_: int) -> list[Path]:
    """Eight sheets of six rows; sheet k shares three rows with sheet k+1."""
    rows = rows_of(round_)
    return [
        write_sheet(
            folder / f"r{round_}-s{k}.csv", HEADER, *[rows[(3 * k + j) % 24] for j in range(6)]
        )
        for k in range(PROCESSES)
    ]


def assert_sound(ledger: Ledger) -> None:
    """Database integrity, and no entry without its first revision or with a gap."""
    with ledger.engine.connect() as connection:
        if ledger.engine.dialect.name == "sqlite":
            assert connection.exec_driver_sql("PRAGMA integrity_check").scalar() == "ok"
            assert connection.exec_driver_sql("PRAGMA foreign_key_check").all() == []
        revisions = connection.execute(
            select(EntryRevision.entry_id, func.count(), func.max(EntryRevision.revision)).group_by(
                EntryRevision.entry_id
            )
        ).all()
        entries = connection.execute(select(func.count()).select_from(Entry)).scalar()
    assert len(revisions) == entries
    assert all(count == top for _, count, top in revisions)


def assert_all_succeeded(results: list[subprocess.CompletedProcess[str]]) -> None:
    for r in results:
        assert r.returncode == 0, r.stderr
        assert "Traceback" not in r.stderr


def test_concurrent_imports_hold_exactly_the_union(registry_url: str, tmp_path: Path) -> None:
    """Round 0 also races on creating the registry; round 1 mixes new sheets with half of
    round 0's again."""
    rounds = [overlapping_sheets(tmp_path, 0)]
    rounds.append(overlapping_sheets(tmp_path, 1)[::2] + rounds[0][1::2])
    for sheets in rounds:
        results = run_all(
            [command("import", s, "--create-sources", "--db", registry_url) for s in sheets]
        )
        assert_all_succeeded(results)
    ledger = Ledger.open(registry_url)
    got = sorted((e.source, e.quantity, float(e.reported["estimate"])) for e in ledger.entries())
    want = sorted((r[0], r[1], float(r[3])) for n in (0, 1) for r in rows_of(n))
    assert got == want
    assert {s.key for s in ledger.sources()} == {f"src{n}-{i}" for n in (0, 1) for i in range(6)}
    assert_sound(ledger)
    ledger.engine.dispose()


def _loaded(registry_url: str, tmp_path: Path) -> Ledger:
    ledger = Ledger.open(registry_url)
    ledger.import_sheet(
        write_sheet(tmp_path / "base.csv", HEADER, *rows_of(0)[:4]), create_sources=True
    )
    return ledger


def test_concurrent_builds_take_consecutive_versions(registry_url: str, tmp_path: Path) -> None:
    ledger = _loaded(registry_url, tmp_path)
    files = []
    for k in range(PROCESSES):
        files.append(tmp_path / f"def{k}.toml")
        files[-1].write_text(DEFINITION.format(k=k))
    results = run_all([command("build", f, "--json", "--db", registry_url) for f in files])
    assert_all_succeeded(results)
    versions = sorted(json.loads(r.stdout)["version"] for r in results)
    assert versions == list(range(1, PROCESSES + 1))
    with ledger.session() as session:
        stored = session.scalars(select(PriorVersion.version)).all()
        uses = session.scalar(select(func.count()).select_from(PriorEntry))
    assert sorted(stored) == versions
    assert uses == 4 * PROCESSES  # every version with all four of its entries
    assert_sound(ledger)
    ledger.engine.dispose()


def test_concurrent_revisions_take_consecutive_numbers(registry_url: str, tmp_path: Path) -> None:
    ledger = _loaded(registry_url, tmp_path)
    results = run_all(
        [
            command("revise", 1, "--set", f"x_note=n{k}", "--reason", f"r{k}", "--db", registry_url)
            for k in range(PROCESSES)
        ]
    )
    assert_all_succeeded(results)
    history = ledger.entry(1)
    assert [r.revision for r in history.revisions] == list(range(1, PROCESSES + 2))
    # each revision applied to the one before it: no change was lost, none repeated
    assert sorted(r.reason for r in history.revisions[1:]) == sorted(
        f"r{k}" for k in range(PROCESSES)
    )
    assert history.current.extra["x_note"] == f"n{history.current.reason[1:]}"
    assert_sound(ledger)
    ledger.engine.dispose()


def test_concurrent_retractions_one_wins(registry_url: str, tmp_path: Path) -> None:
    ledger = _loaded(registry_url, tmp_path)
    results = run_all(
        [
            command("sources", "retract", "src0-0", "--reason", f"notice {k}", "--db", registry_url)
            for k in range(PROCESSES)
        ]
    )
    assert sorted(r.returncode for r in results) == [0] + [2] * (PROCESSES - 1)
    for r in results:
        if r.returncode:
            assert r.stderr.strip() == "error: 'key': source 'src0-0' is already retracted"
    (source,) = [s for s in ledger.sources() if s.key == "src0-0"]
    assert source.retracted
    ledger.engine.dispose()


KILL_AFTER = (1.0, 2.0, 3.0)


def _killed(args: list[str], delay: float) -> None:
    process = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    time.sleep(delay)
    process.send_signal(signal.SIGKILL)
    process.wait()


def test_sigkill_during_import_leaves_all_or_nothing(registry_url: str, tmp_path: Path) -> None:
    Ledger.open(registry_url).engine.dispose()
    rows = [[f"k{i % 50}", "big", "risk_ratio", 0.5 + i / 1e4, 0.3, 0.9] for i in range(3000)]
    sheet = write_sheet(tmp_path / "big.csv", HEADER, *rows)
    for delay in KILL_AFTER:
        _killed(command("import", sheet, "--create-sources", "--db", registry_url), delay)
        ledger = Ledger.open(registry_url)
        assert len(ledger.entries()) in (0, len(rows))
        assert_sound(ledger)
        ledger.engine.dispose()


def test_sigkill_during_build_leaves_whole_versions(registry_url: str, tmp_path: Path) -> None:
    ledger = _loaded(registry_url, tmp_path)
    definition = tmp_path / "def.toml"
    for k, delay in enumerate(KILL_AFTER):
        definition.write_text(DEFINITION.format(k=k))
        _killed(command("build", definition, "--db", registry_url), delay)
        with ledger.session() as session:
            versions = session.scalars(select(PriorVersion.version)).all()
            counts = session.execute(
                text("SELECT prior_id, count(*) FROM prior_entries GROUP BY prior_id")
            ).all()
        assert sorted(versions) == list(range(1, len(versions) + 1))
        assert len(counts) == len(versions)
        assert all(n == 4 for _, n in counts)
    assert_sound(ledger)
    ledger.engine.dispose()


def test_same_sheet_at_once_says_already_there(registry_url: str, tmp_path: Path) -> None:
    sheet = write_sheet(tmp_path / "same.csv", HEADER, *rows_of(0))
    Ledger.open(registry_url).engine.dispose()
    results = run_all([command("import", sheet, "--create-sources", "--db", registry_url)] * 4)
    assert_all_succeeded(results)
    assert sum("already in the registry" in r.stderr for r in results) == 3
