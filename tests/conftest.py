"""Shared fixtures: a fresh migrated registry, and the CLI run in-process or as a user runs it."""

from __future__ import annotations

import os
import subprocess
import sys
import uuid
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import pytest

from registry.cli.app import main
from registry.storage.ledger import Ledger


@pytest.fixture
def db_path(tmp_path: Path) -> Path:
    return tmp_path / "registry.db"


# A PostgreSQL server to run the back-end tests against as well, as a SQLAlchemy URL whose
# role may create databases (`.ci/run` starts one on loopback and sets it); unset, those
# tests are skipped.
PG_ENV = "PRIORLEDGER_TEST_PG"


def fresh_postgres_database(base: str) -> Iterator[str]:
    """A new, empty database on the server of `base` for one test; dropped afterwards."""
    from sqlalchemy import create_engine
    from sqlalchemy.engine import make_url

    name = f"priorledger_test_{uuid.uuid4().hex[:12]}"
    admin = create_engine(base, isolation_level="AUTOCOMMIT")
    with admin.connect() as connection:
        connection.exec_driver_sql(f'CREATE DATABASE "{name}"')
    try:
        yield make_url(base).set(database=name).render_as_string(hide_password=False)
    finally:
        with admin.connect() as connection:
            connection.exec_driver_sql(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        admin.dispose()


@pytest.fixture(params=["sqlite", "postgresql"])
def registry_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """A fresh registry location on each back end: a SQLite file, and a new PostgreSQL
    database when PRIORLEDGER_TEST_PG names a server (else that case is skipped)."""
    if request.param == "sqlite":
        yield str(tmp_path / "registry.db")
        return
    base = os.environ.get(PG_ENV)
    if not base:
        pytest.skip(f"{PG_ENV} is not set: no PostgreSQL server to test against")
    yield from fresh_postgres_database(base)


@pytest.fixture
def ledger(registry_url: str) -> Iterator[Ledger]:
    registry = Ledger.open(registry_url)
    yield registry
    registry.engine.dispose()


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


def simple_definition(
    name: str, quantity: str, *, parameter: str = "log risk ratio", method: str = "common"
) -> str:
    """An invented prior definition with no discounting, for tests of commands and storage."""
    return f"""name = "{name}"
parameter = "{parameter} (invented)"
target = "mean"
[select]
quantity = "{quantity}"
[pool]
method = "{method}"
[discount]
mechanism = "none"
[output]
unit_sd = 2.0
ess_unit = "participants"
"""
