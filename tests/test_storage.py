"""The registry's storage: migrations, append-only history, all-or-nothing imports."""

from __future__ import annotations

from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import create_engine, inspect

from registry.errors import InputError, NotFoundError
from registry.storage import db, location
from registry.storage.ledger import Ledger
from registry.storage.models import Base
from tests.conftest import write_sheet

HEADER = ["source", "quantity", "measure", "events", "exposure", "tags", "location"]


def test_empty_database_upgrades_to_head(tmp_path: Path) -> None:
    engine = db.make_engine(f"sqlite:///{tmp_path / 'fresh.db'}")
    assert db.current_revision(engine) is None
    db.ensure_schema(engine)
    assert db.current_revision(engine) == db.head_revision()
    assert {"sources", "studies", "entries", "entry_revisions", "entry_tags"} <= set(
        inspect(engine).get_table_names()
    )


def test_models_match_the_migrated_schema(ledger: Ledger) -> None:
    with ledger.engine.connect() as connection:
        diff = compare_metadata(MigrationContext.configure(connection), Base.metadata)
    assert diff == []


def test_a_foreign_database_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "other.db"
    engine = create_engine(f"sqlite:///{path}")
    with engine.begin() as connection:
        connection.exec_driver_sql("CREATE TABLE notes (x TEXT)")
    with pytest.raises(InputError, match="not a priorledger registry"):
        Ledger.open(str(path))


def test_location_resolution(monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("PRIORLEDGER_DB", raising=False)
    assert location.resolve_url() == f"sqlite:///{tmp_path / 'priorledger.db'}"
    monkeypatch.setenv("PRIORLEDGER_DB", "team.db")
    assert location.resolve_url() == f"sqlite:///{tmp_path / 'team.db'}"
    assert location.resolve_url("postgresql://u@h/x") == "postgresql://u@h/x"


def test_import_twice_adds_nothing(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(
        tmp_path / "s.csv", HEADER, ["a2020", "q", "rate", 10, 20.0, "x;y", "Table 1"]
    )
    first = ledger.import_sheet(sheet, create_sources=True)
    second = ledger.import_sheet(sheet, create_sources=True)
    assert len(first.added) == 1 and second.added == () and second.skipped == 1
    assert len(ledger.entries()) == 1
    assert ledger.entries(tags=["x", "y"])[0].context["location"] == "Table 1"
    assert ledger.entries(tags=["z"]) == []


def test_dry_run_writes_nothing(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(tmp_path / "s.csv", HEADER, ["a2020", "q", "rate", 10, 20.0, "", ""])
    report = ledger.import_sheet(sheet, dry_run=True, create_sources=True)
    assert len(report.planned("add")) == 1 and report.new_sources == ("a2020",)
    assert ledger.entries() == [] and ledger.sources() == []


def test_one_bad_row_writes_nothing(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(
        tmp_path / "s.csv",
        HEADER,
        ["a2020", "q", "rate", 10, 20.0, "", ""],
        ["b2021", "q", "rate", 10, -1, "", ""],
    )
    with pytest.raises(InputError) as raised:
        ledger.import_sheet(sheet, create_sources=True)
    assert raised.value.row == 3 and raised.value.field == "exposure"
    assert ledger.entries() == [] and ledger.sources() == []


def test_revision_keeps_history_and_rederives(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(tmp_path / "s.csv", HEADER, ["a2020", "q", "rate", 10, 20.0, "", ""])
    (entry_id,) = ledger.import_sheet(sheet, create_sources=True).added
    before = ledger.entries()[0]
    after = ledger.revise(entry_id, {"events": "12"}, "typo in Table 2")
    history = ledger.entry(entry_id)
    assert [r.revision for r in history.revisions] == [1, 2]
    assert history.revisions[0].y == before.y and history.revisions[0].reported["events"] == "10"
    assert after.reported["events"] == "12" and after.y != before.y
    assert history.revisions[1].reason == "typo in Table 2"
    # the original row still counts as imported: re-importing it adds nothing
    assert ledger.import_sheet(sheet, create_sources=True).added == ()


def test_revision_is_validated_like_an_import(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(tmp_path / "s.csv", HEADER, ["a2020", "q", "rate", 10, 20.0, "", ""])
    (entry_id,) = ledger.import_sheet(sheet, create_sources=True).added
    with pytest.raises(InputError) as raised:
        ledger.revise(entry_id, {"exposure": "0"}, "wrong")
    assert raised.value.field == "exposure"
    with pytest.raises(InputError):
        ledger.revise(entry_id, {"events": "12"}, "  ")
    with pytest.raises(NotFoundError):
        ledger.revise(999, {"events": "12"}, "x")
    assert len(ledger.entry(entry_id).revisions) == 1


def test_bibtex_and_ris_sources(ledger: Ledger, tmp_path: Path) -> None:
    bib = tmp_path / "refs.bib"
    bib.write_text(
        "@article{colditz1994,\n author = {Colditz, G. A. and Brewer, T. F.},\n"
        " title = {Efficacy of {BCG} vaccine in the prevention of tuberculosis},\n"
        " journal = {JAMA}, year = {1994}, doi = {10.1001/jama.1994.03510330076038}}\n"
    )
    ris = tmp_path / "refs.ris"
    ris.write_text(
        "TY  - JOUR\nAU  - Higgins, Julian P. T.\nAU  - Thompson, Simon G.\n"
        "TI  - Quantifying heterogeneity in a meta-analysis\nT2  - Statistics in Medicine\n"
        "PY  - 2002\nDO  - 10.1002/sim.1186\nER  - \n"
    )
    assert ledger.import_sources(bib).added == ("colditz1994",)
    assert ledger.import_sources(ris).added == ("higgins2002",)
    assert ledger.import_sources(bib).unchanged == 1
    found = {s.key: s for s in ledger.sources()}
    assert found["colditz1994"].doi == "10.1001/jama.1994.03510330076038"
    assert found["colditz1994"].citation.startswith("Colditz, G. A.; Brewer, T. F. (1994)")
    assert found["higgins2002"].year == 2002


def test_conflicting_source_is_refused(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(
        tmp_path / "s.csv",
        ["source", "quantity", "measure", "events", "exposure", "doi"],
        ["a2020", "q", "rate", 10, 20.0, "10.5555/one"],
        ["a2020", "q", "rate", 11, 20.0, "10.5555/two"],
    )
    with pytest.raises(InputError) as raised:
        ledger.import_sheet(sheet, create_sources=True)
    assert raised.value.field == "doi" and raised.value.row == 3


def test_retraction_flags_and_keeps(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(tmp_path / "s.csv", HEADER, ["a2020", "q", "rate", 10, 20.0, "", ""])
    ledger.import_sheet(sheet, create_sources=True)
    ledger.retract("a2020", "retracted by the journal")
    assert ledger.entries() == []  # left out of every selection by default
    (entry,) = ledger.entries(include_retracted=True)  # kept, and flagged
    assert entry.retracted
    with pytest.raises(InputError):
        ledger.retract("a2020", "again")
    with pytest.raises(NotFoundError):
        ledger.retract("nobody", "x")


def test_studies_link_reports(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(
        tmp_path / "s.csv",
        ["source", "study", "quantity", "measure", "events", "exposure"],
        ["a2020", "TRIAL-1", "q", "rate", 10, 20.0],
        ["b2022", "TRIAL-1", "q", "rate", 11, 21.0],
        ["c2021", "", "q", "rate", 12, 22.0],
    )
    ledger.import_sheet(sheet, create_sources=True)
    assert [e.study for e in ledger.entries()] == ["TRIAL-1", "TRIAL-1", "c2021"]
