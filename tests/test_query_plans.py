"""The listings and look-ups of a large registry read through indexes (issue 13, goal 2):
SQLite's EXPLAIN QUERY PLAN for each query names an index or an integer primary key for
every table it reads, and never a full scan of the entry tables or a sort of all of them.

The registry is small here; which plan SQLite chooses without statistics (no ANALYZE) does
not depend on the rows present, so the plans are those of a registry of any size.
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from sqlalchemy import text

from registry.storage.ledger import Ledger
from registry.storage.reads import entries_sql, latest_revisions_sql, sources_sql
from tests.conftest import write_sheet


@pytest.fixture
def ledger(tmp_path: Path) -> Ledger:
    """A SQLite registry: the plans read here are SQLite's EXPLAIN QUERY PLAN."""
    return Ledger.open(str(tmp_path / "plans.db"))


def plan(ledger: Ledger, query: tuple[str, dict]) -> list[str]:
    sql, params = query
    with ledger.engine.connect() as connection:
        return [row[-1] for row in connection.execute(text("EXPLAIN QUERY PLAN " + sql), params)]


def assert_indexed(steps: list[str]) -> None:
    for step in steps:
        if step.startswith("SCAN"):
            # a walk is only allowed along an index, in the listing's own order
            assert "USING" in step and "INDEX" in step, steps
    assert not any(
        "TEMP B-TREE" in step and "ORDER BY" in step for step in steps if "entry" in step
    ), steps


@pytest.mark.parametrize(
    ("filters", "index"),
    [
        ({"quantity": "q"}, "ix_entry_revisions_quantity_entry"),
        ({"tags": ["t"]}, "ix_entry_tags_tag_revision"),
        ({"tags": ["t"], "tags_in_id_order": True}, "sqlite_autoindex_entry_tags_1"),
        ({"ids": [1, 2]}, "sqlite_autoindex_entry_revisions_1"),
    ],
)
def test_entry_listings_use_the_indexes(ledger: Ledger, filters: dict, index: str) -> None:
    steps = plan(ledger, entries_sql(include_retracted=True, limit=1000, **filters))
    assert any(index in step for step in steps), steps
    # the current revision is found by a probe of the (entry, revision) index, not a GROUP BY
    assert any("sqlite_autoindex_entry_revisions_1 (entry_id=? AND revision>?)" in s for s in steps)
    assert_indexed([s for s in steps if "entry_revisions" in s or "entry_tags" in s])


def test_a_common_tag_walks_the_entries_in_id_order_without_sorting(ledger: Ledger) -> None:
    steps = plan(
        ledger, entries_sql(tags=["t"], include_retracted=True, tags_in_id_order=True, limit=9)
    )
    assert not any("TEMP B-TREE" in s for s in steps), steps
    assert any(s.startswith("SCAN") and "sqlite_autoindex_entry_revisions_1" in s for s in steps)


def test_sources_are_counted_on_the_source_index(ledger: Ledger) -> None:
    steps = plan(ledger, sources_sql(limit=1000))
    assert any("ix_entry_revisions_source_entry (source_id=?)" in s for s in steps), steps
    assert any("sqlite_autoindex_sources_1" in s for s in steps), steps


def test_staleness_reads_the_latest_revisions_from_the_index(ledger: Ledger) -> None:
    params: dict = {}
    steps = plan(ledger, (latest_revisions_sql([1, 2, 3], params), params))
    assert any("COVERING INDEX sqlite_autoindex_entry_revisions_1" in s for s in steps), steps


def test_listings_come_a_page_at_a_time(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    header = ["source", "quantity", "measure", "events", "exposure", "tags", "location"]
    rows = [[f"s{i}", "q", "rate", 10 + i, 20.0, "t", ""] for i in range(3)]
    sheet = write_sheet(tmp_path / "s.csv", header, *rows)
    db = tmp_path / "r.db"
    assert cli("import", sheet, "--create-sources", "--db", db).code == 0
    first = cli("entries", "--tag", "t", "--limit", "2", "--json", "--db", db)
    doc = json.loads(first.stdout)
    assert [e["source"] for e in doc["entries"]] == ["s0", "s1"] and doc["next_offset"] == 2
    assert "--offset 2" in first.stderr
    last = json.loads(cli("entries", "--offset", "2", "--json", "--db", db).stdout)
    assert [e["source"] for e in last["entries"]] == ["s2"] and last["next_offset"] is None
    every = json.loads(cli("sources", "--limit", "0", "--json", "--db", db).stdout)
    assert [s["entries"] for s in every["sources"]] == [1, 1, 1] and every["next_offset"] is None
