"""Shared fixtures: a fresh migrated registry, and the CLI run in-process or as a user runs it."""

from __future__ import annotations

import os
import subprocess
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

from registry.cli.app import main
from registry.storage.ledger import Ledger


@pytest.fixture
def db_path(tmp_path: Path) -> Path:
    return tmp_path / "registry.db"


@pytest.fixture
def ledger(db_path: Path) -> Ledger:
    return Ledger.open(str(db_path))


@dataclass
class Result:
    code: int
    stdout: str
    stderr: str


@pytest.fixture
def cli(capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch):
    """Run `priorledger ARGS` in this process and return its exit code and output."""
    monkeypatch.setenv("NO_COLOR", "1")
    monkeypatch.setenv("COLUMNS", "200")

    def run(*args: str) -> Result:
        capsys.readouterr()
        monkeypatch.setattr(sys, "argv", ["priorledger", *map(str, args)])
        with pytest.raises(SystemExit) as stop:
            main()
        captured = capsys.readouterr()
        code = stop.value.code if isinstance(stop.value.code, int) else 0
        return Result(code, captured.out, captured.err)

    return run


def run_installed(*args: str, cwd: Path, env: dict[str, str] | None = None) -> Result:
    """Run the installed console command in a subprocess, as a user would."""
    done = subprocess.run(
        ["priorledger", *map(str, args)],
        capture_output=True,
        text=True,
        cwd=cwd,
        env={**os.environ, "NO_COLOR": "1", "COLUMNS": "200", **(env or {})},
        timeout=600,
    )
    return Result(done.returncode, done.stdout, done.stderr)


def write_sheet(path: Path, header: list[str], *rows: list[object]) -> Path:
    import csv

    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(header)
        writer.writerows(rows)
    return path
