"""The whole job on each back end (SQLite, and PostgreSQL when PRIORLEDGER_TEST_PG is set):
import, revise, build, verify, trace; the same inputs give the same digest on both."""

from __future__ import annotations

import json
import os
from pathlib import Path

import pytest

from tests.conftest import PG_ENV, simple_definition, write_sheet

HEADER = ["source", "quantity", "measure", "estimate", "lower", "upper"]
# Invented rows.
ROWS = [
    ["t2001", "effect", "risk_ratio", 0.80, 0.60, 1.07],
    ["t2005", "effect", "risk_ratio", 0.70, 0.50, 0.98],
    ["t2011", "effect", "risk_ratio", 0.95, 0.75, 1.20],
]
DEFINITION = simple_definition("effect-prior", "effect", method="reml")


def _job(cli, db: str, folder: Path) -> dict:
    sheet = write_sheet(folder / "sheet.csv", HEADER, *ROWS)
    definition = folder / "def.toml"
    definition.write_text(DEFINITION)
    assert cli("import", sheet, "--create-sources", "--db", db).code == 0
    first = json.loads(cli("build", definition, "--json", "--db", db).stdout)
    assert cli("verify", "effect-prior", "--db", db).code == 0
    revised = cli("revise", "2", "--set", "upper=0.99", "--reason", "typo", "--db", db)
    assert revised.code == 0, revised.stderr
    stale = cli("verify", "effect-prior", "--db", db)
    assert stale.code == 1 and "revision 2" in stale.stderr
    second = json.loads(cli("build", definition, "--json", "--db", db).stdout)
    assert (first["version"], second["version"]) == (1, 2)
    trace = json.loads(cli("trace", "effect-prior", "--json", "--db", db).stdout)
    assert [(e["id"], e["revision"]) for e in trace["entries"]] == [(1, 1), (2, 2), (3, 1)]
    return second


def test_the_job_on_each_back_end(cli, registry_url: str, tmp_path: Path) -> None:
    here = _job(cli, registry_url, tmp_path)
    if "://" in registry_url:  # the same job on SQLite must give the same prior
        reference = tmp_path / "sqlite"
        reference.mkdir()
        there = _job(cli, str(reference / "r.db"), reference)
        assert here["digest"] == there["digest"]


def test_bad_credentials_are_one_line_without_the_password(cli) -> None:
    from sqlalchemy.engine import make_url

    base = os.environ.get(PG_ENV)
    if not base:
        pytest.skip(f"{PG_ENV} is not set: no PostgreSQL server to test against")
    wrong = make_url(base).set(password="not-the-password-xyz").render_as_string(False)
    for url in (wrong, make_url(base).set(database="no_such_db_xyz").render_as_string(False)):
        result = cli("entries", "--db", url)
        assert result.code == 2
        assert len(result.stderr.strip().splitlines()) == 1
        assert "not-the-password-xyz" not in result.stderr
        assert make_url(base).password not in result.stderr
