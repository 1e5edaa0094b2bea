"""Ingestion as papers print numbers and curators keep sheets: reported forms, row identity,
corrections by re-import. The numbers here are invented test rows, not the demo's."""

from __future__ import annotations

import json
import math
from pathlib import Path

import pytest
from alembic import command
from scipy import stats
from sqlalchemy import text

from registry.errors import InputError
from registry.evidence.sheets import parse_row
from registry.storage import db
from registry.storage.ledger import Ledger
from tests.conftest import write_sheet

HEADER = ["row_key", "source", "quantity", "measure", "estimate", "lower", "upper", "notes"]
ROWS = [
    ["r1", "lee2011", "effect", "mean_difference", "-3.0", "-5.10", "-0.90", "Table 2"],
    ["r2", "lee2011", "baseline", "proportion", "0.20", "0.150", "0.260", "Table 1"],
]


def test_p_as_an_inequality_uses_the_bound_and_says_so() -> None:
    """Cochrane Handbook v6 §6.3.2 (ratios): z = Φ⁻¹(1 - p/2), se = |ln OR| / z; with p given
    as <0.001 the bound is used as the p-value (conservative)."""
    row = parse_row({"source": "a", "quantity": "q", "measure": "odds_ratio",
                     "estimate": "2.5", "p": "<0.001"})  # fmt: skip
    z = stats.norm.isf(0.001 / 2)
    assert row.derived.se == pytest.approx(math.log(2.5) / z, rel=1e-12)
    assert row.derived.conversion == "p_bound_log"
    assert "conservative" in row.derived.corrections[0]
    for printed in ("p<0.001", "P < 0.001", "≤0.001"):
        same = parse_row({"source": "a", "quantity": "q", "measure": "odds_ratio",
                          "estimate": "2.5", "p": printed})  # fmt: skip
        assert (same.derived, same.fingerprint) == (row.derived, row.fingerprint)
    exact = parse_row({"source": "a", "quantity": "q", "measure": "odds_ratio",
                       "estimate": "2.5", "p": "0.001"})  # fmt: skip
    assert exact.derived.se == row.derived.se and exact.derived.conversion == "p_value_log"
    assert exact.fingerprint != row.fingerprint  # a bound is not the same report as a value


@pytest.mark.parametrize(
    "cells", [{"estimate": "<2", "se": "0.1"}, {"estimate": "2", "p": ">0.05"}]
)
def test_only_a_p_value_may_be_a_bound(cells: dict[str, str]) -> None:
    with pytest.raises(InputError):
        parse_row({"source": "a", "quantity": "q", "measure": "odds_ratio", **cells})


def test_percent_is_a_proportion() -> None:
    base = {"source": "a", "quantity": "q", "measure": "proportion"}
    percent = parse_row({**base, "estimate": "15%", "lower": "10%", "upper": "21%", "level": "95%"})
    plain = parse_row({**base, "estimate": "0.15", "lower": "0.1", "upper": "0.21"})
    assert percent.derived == plain.derived
    assert percent.numbers["estimate"] == repr(0.15)
    with pytest.raises(InputError, match="percentage"):
        parse_row({**base, "measure": "odds_ratio", "estimate": "15%", "se": "0.1"})


def test_decimal_comma_only_when_asked() -> None:
    cells = {"source": "a", "quantity": "q", "measure": "proportion",
             "estimate": "0,15", "lower": "0,1", "upper": "0,21"}  # fmt: skip
    with pytest.raises(InputError, match="--decimal-comma"):
        parse_row(cells)
    comma = parse_row(cells, decimal_comma=True)
    plain = parse_row({**cells, "estimate": "0.15", "lower": "0.10", "upper": "0.21"})
    assert comma.derived == plain.derived and comma.fingerprint == plain.fingerprint
    with pytest.raises(InputError, match=r"no '\.'"):
        parse_row({**cells, "estimate": "0.15"}, decimal_comma=True)


def test_semicolon_csv_with_decimal_commas(ledger: Ledger, tmp_path: Path) -> None:
    sheet = tmp_path / "eu.csv"
    sheet.write_text("source;quantity;measure;estimate;lower;upper\na;q;proportion;0,2;0,15;0,26\n")
    report = ledger.import_sheet(sheet, decimal_comma=True, create_sources=True)
    (entry,) = ledger.entries()
    assert report.added == (entry.id,)
    assert entry.y == pytest.approx(math.log(0.2 / 0.8))
    assert entry.reported["estimate"] == "0.2"


def write_xlsx(path: Path, header: list[str], rows: list[list[str]]) -> Path:
    """The sheet as Excel keeps it: numbers as numbers (0.90 becomes 0.9, -3.0 becomes -3)."""
    from openpyxl import Workbook

    book = Workbook()
    sheet = book.active
    sheet.append(header)
    for row in rows:
        sheet.append([_as_excel(c) for c in row])
    book.save(path)
    return path


def _as_excel(cell: str) -> object:
    try:
        return float(cell)
    except ValueError:
        return cell


def test_csv_and_xlsx_copies_are_one_set_of_rows(ledger: Ledger, tmp_path: Path) -> None:
    csv_sheet = write_sheet(tmp_path / "s.csv", HEADER, *ROWS)
    xlsx_sheet = write_xlsx(tmp_path / "s.xlsx", HEADER, ROWS)
    first = ledger.import_sheet(csv_sheet, create_sources=True)
    second = ledger.import_sheet(xlsx_sheet)
    assert len(first.added) == 2
    assert second.added == () and second.skipped == 2
    assert [p.entry for p in second.planned("present")] == list(first.added)
    assert len(ledger.entries()) == 2


def test_identity_ignores_row_keys_and_notes_only_for_unkeyed_rows(
    ledger: Ledger, tmp_path: Path
) -> None:
    unkeyed = [h for h in HEADER if h != "row_key"]
    plain = write_sheet(tmp_path / "p.csv", unkeyed, *[r[1:] for r in ROWS])
    ledger.import_sheet(plain, create_sources=True)
    keyed = ledger.import_sheet(write_sheet(tmp_path / "k.csv", HEADER, *ROWS))
    assert keyed.added == () and keyed.skipped == 2
    # the keys were adopted by the stored entries: a correction now revises them
    assert ledger.entry(1).row_key == "r1"


def test_correction_revises_and_the_old_file_does_not_revert(
    ledger: Ledger, tmp_path: Path
) -> None:
    old = write_sheet(tmp_path / "v1.csv", HEADER, *ROWS)
    (e1, e2) = ledger.import_sheet(old, create_sources=True).added
    fixed_rows = [[*ROWS[0][:5], "-5.2", "-0.8", "Table 2"], ROWS[1]]
    fixed = write_sheet(tmp_path / "v2.csv", HEADER, *fixed_rows)
    dry = ledger.import_sheet(fixed, dry_run=True)
    assert [(p.row, p.entry, p.revision) for p in dry.planned("revise")] == [(2, e1, 2)]
    assert ledger.entry(e1).current.revision == 1  # a dry run writes nothing
    report = ledger.import_sheet(fixed)
    assert report.added == ()
    history = ledger.entry(e1)
    assert history.current.revision == 2
    assert history.current.reason == "re-imported from v2.csv row 2"
    assert history.current.reported["lower"] == "-5.2"
    again = ledger.import_sheet(old)
    assert [(p.row, p.entry, p.revision) for p in again.planned("not_reverted")] == [(2, e1, 1)]
    assert ledger.entry(e1).current.revision == 2
    assert len(ledger.entries()) == 2
    back = ledger.import_sheet(old, allow_revert=True, reason="the erratum was withdrawn")
    assert [p.entry for p in back.planned("revise")] == [e1]
    current = ledger.entry(e1).current
    assert (current.revision, current.reason) == (3, "the erratum was withdrawn")
    assert current.reported["lower"] == "-5.10"
    assert ledger.entry(e2).current.revision == 1


def test_dry_run_json_lists_each_kind_of_row(cli, db_path: Path, tmp_path: Path) -> None:
    old = write_sheet(tmp_path / "v1.csv", HEADER, *ROWS)
    assert cli("import", old, "--create-sources", "--db", db_path).code == 0
    assert cli("import", write_sheet(tmp_path / "v2.csv", HEADER,
               [*ROWS[0][:5], "-5.2", "-0.8", "Table 2"]), "--db", db_path).code == 0  # fmt: skip
    new_row = ["r3", "lee2011", "effect-12m", "mean_difference", "-1", "-2", "0", ""]
    sheet = write_sheet(tmp_path / "v3.csv", HEADER, ROWS[0], ROWS[1], new_row)
    result = cli("import", sheet, "--dry-run", "--json", "--db", db_path)
    assert result.code == 0
    doc = json.loads(result.stdout)
    assert [r["row"] for r in doc["rows_add"]] == [4]
    assert [r["row"] for r in doc["rows_present"]] == [3]
    assert doc["rows_not_reverted"][0]["changes"]["lower"] == {"from": "-5.2", "to": "-5.10"}
    fixed = write_sheet(tmp_path / "v4.csv", HEADER, [*ROWS[0][:5], "-5.3", "-0.8", "T2"])
    doc = json.loads(cli("import", fixed, "--dry-run", "--json", "--db", db_path).stdout)
    changes = {"lower": {"from": "-5.2", "to": "-5.3"}, "notes": {"from": "Table 2", "to": "T2"}}
    assert doc["rows_revise"] == [{"row": 2, "entry": 1, "revision": 3, "changes": changes}]


def test_an_unknown_source_is_never_created_silently(cli, db_path: Path, tmp_path: Path) -> None:
    """By default a new key creates a source and stderr names it; --known-sources refuses."""
    sheet = write_sheet(tmp_path / "s.csv", HEADER, *ROWS)
    refused = cli("import", sheet, "--known-sources", "--db", db_path)
    assert refused.code == 2 and "row 2" in refused.stderr and "'source'" in refused.stderr
    assert "--known-sources" in refused.stderr
    created = cli("import", sheet, "--db", db_path)
    assert created.code == 0 and "created" in created.stderr and "no bibliography" in created.stderr
    assert ROWS[0][1] in created.stderr


def test_a_registry_from_before_row_identity_keeps_its_rows(tmp_path: Path) -> None:
    """Migration 0004 gives stored revisions their identity: the same rows, exported by a
    spreadsheet in another notation, are recognised after the upgrade."""
    path = tmp_path / "old.db"
    engine = db.make_engine(f"sqlite:///{path}")
    config = db._alembic_config()
    with engine.begin() as connection:
        config.attributes["connection"] = connection
        command.upgrade(config, "0002")
        now = "2026-01-01 00:00:00"
        connection.execute(text(
            "INSERT INTO sources (id, key, retracted, created_at) VALUES (1, 'lee2011', 0, :t);"
        ), {"t": now})  # fmt: skip
        connection.execute(
            text("INSERT INTO studies (id, key, created_at) VALUES (1, 'lee2011', :t)"), {"t": now}
        )
        connection.execute(
            text("INSERT INTO entries (id, fingerprint, created_at) VALUES (1, :f, :t)"),
            {"f": "0" * 64, "t": now},
        )
        connection.execute(
            text(
                "INSERT INTO entry_revisions (id, entry_id, revision, source_id, study_id, "
                "quantity, measure, reported, y, se, scale, conversion, corrections, context, "
                "extra, reason, created_at) VALUES (1, 1, 1, 1, 1, 'effect', 'mean_difference', "
                ":reported, -3, 1, 'identity', 'ci', '[]', '{}', '{}', 'imported', :t)"
            ),
            {"reported": json.dumps(dict(zip(HEADER[4:7], ROWS[0][4:7], strict=True))), "t": now},
        )
    ledger = Ledger.open(str(path))
    assert db.current_revision(ledger.engine) == db.head_revision()
    unkeyed = [h for h in HEADER if h != "row_key"]
    xlsx = write_xlsx(tmp_path / "s.xlsx", unkeyed, [ROWS[0][1:]])
    report = ledger.import_sheet(xlsx)
    assert report.added == () and [p.entry for p in report.planned("present")] == [1]


BIB = r"""@article{muller2019,
  author = {M{\"u}ller, Anna and {\'O}lafsson, Jon},
  title = {Falls {\&} balance in {O}lder adults},
  journal = {Invented Journal of Tests},
  year = {2019}
}

@article{lee2011,
  author = {Lee, K},
  title = {An invented trial},
  year = {2011}
}
"""


def test_bibtex_is_decoded_to_unicode(ledger: Ledger, tmp_path: Path) -> None:
    bib = tmp_path / "refs.bib"
    bib.write_text(BIB.replace("{\\&}", "\\&"), encoding="utf-8")
    ledger.import_sources(bib)
    source = next(s for s in ledger.sources() if s.key == "muller2019")
    assert source.authors == "Müller, Anna; Ólafsson, Jon"
    assert source.title == "Falls & balance in Older adults"


def test_duplicate_bibtex_keys_name_both_lines(tmp_path: Path) -> None:
    from registry.evidence.bibliography import read_bibliography

    bib = tmp_path / "refs.bib"
    bib.write_text(BIB + BIB.split("\n\n")[1] + "\n", encoding="utf-8")
    with pytest.raises(InputError, match="'lee2011' appears twice: on line 8 and on line 13"):
        read_bibliography(bib)


def test_sources_are_edited_and_updated_as_revisions(cli, db_path: Path, tmp_path: Path) -> None:
    bib = tmp_path / "refs.bib"
    bib.write_text(BIB, encoding="utf-8")
    assert cli("sources", "import", bib, "--db", db_path).code == 0
    edited = cli("sources", "edit", "lee2011", "--set", "year=2012", "--set", "journal=J Inv",
                 "--reason", "online first in 2011", "--db", db_path)  # fmt: skip
    assert edited.code == 0
    refused = cli("sources", "import", bib, "--db", db_path)
    assert refused.code == 2 and "--update" in refused.stderr
    assert cli("sources", "import", bib, "--update", "--db", db_path).code == 0
    doc = json.loads(cli("sources", "show", "lee2011", "--json", "--db", db_path).stdout)
    assert [(r["revision"], r["fields"]["year"], r["reason"]) for r in doc["revisions"]] == [
        (1, 2011, "as first recorded"),
        (2, 2012, "online first in 2011"),
        (3, 2011, "updated from refs.bib"),
    ]
    assert doc["revisions"][1]["fields"]["journal"] == "J Inv"
    assert doc["revisions"][2]["fields"]["journal"] == "J Inv"  # the file has none: kept
    bad = cli("sources", "edit", "lee2011", "--set", "pages=3", "--reason", "x", "--db", db_path)
    assert bad.code == 2 and "'pages'" in bad.stderr


def test_migration_0004_downgrades_and_upgrades_with_data(ledger: Ledger, tmp_path: Path) -> None:
    sheet = write_sheet(tmp_path / "s.csv", HEADER, *ROWS)
    ledger.import_sheet(sheet, create_sources=True)
    config = db._alembic_config()
    for step in (command.downgrade, command.upgrade):
        with ledger.engine.begin() as connection:
            config.attributes["connection"] = connection
            step(config, "0002" if step is command.downgrade else "head")
    assert db.current_revision(ledger.engine) == db.head_revision()
    report = ledger.import_sheet(write_xlsx(tmp_path / "s.xlsx", HEADER, ROWS))
    assert report.added == () and report.skipped == 2
