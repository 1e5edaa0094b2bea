"""The read path (issue 13, goal 2): the commands that only read an up-to-date SQLite registry
use the standard library's `sqlite3`, and must give what the models give.

The reference for every value is the SQLAlchemy models themselves (`EntryView.of` on the
objects an ORM session loads): a second route to the same rows, through SQLAlchemy's own type
handling of JSON, booleans and times, against which the hand-written SQL and its conversions
are checked.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session

from registry.cli.common import Listing
from registry.demo import DEFINITIONS, load_seed, seed_path
from registry.errors import InputError
from registry.priors.definition import load_definition
from registry.priors.store import build_prior, get_prior, trace_prior
from registry.storage.ledger import Ledger
from registry.storage.models import Entry, Source
from registry.storage.readonly import reading
from registry.storage.views import EntryView, SourceView


@pytest.fixture(scope="module")
def registry(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The demo's entries and priors, with a revised entry and a retracted source, so that
    history, staleness and retraction all show."""
    path = tmp_path_factory.mktemp("reads") / "r.db"
    ledger = Ledger.open(str(path))
    load_seed(ledger)
    for name in DEFINITIONS:
        build_prior(ledger, load_definition(seed_path(name)))
    first = ledger.entries()[0]
    ledger.revise(first.id, {"notes": "checked against the paper"}, "second reading")
    ledger.retract(ledger.entries()[-1].source, "INVENTED retraction for the test")
    ledger.engine.dispose()
    return path


def without_ledger(monkeypatch: pytest.MonkeyPatch) -> None:
    """Make any use of the SQLAlchemy route fail, so a test sees the `sqlite3` route alone."""

    def refused(*args: object, **kwargs: object) -> None:
        raise AssertionError("the read opened a Ledger")

    monkeypatch.setattr(Ledger, "open", refused)


def test_entries_and_histories_equal_the_models(
    registry: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ledger = Ledger.open(str(registry))
    with Session(ledger.engine) as session:
        entries = session.scalars(select(Entry).order_by(Entry.id)).all()
        want = [EntryView.of(e.revisions[-1]) for e in entries]
        history = {e.id: [EntryView.of(r) for r in e.revisions] for e in entries}
        sources = {s.key: SourceView.of(s) for s in session.scalars(select(Source))}
    without_ledger(monkeypatch)
    with reading(str(registry)) as reads:
        assert reads.entries(include_retracted=True) == want
        assert [e for e in want if not e.retracted] == reads.entries()
        assert any(e.retracted for e in want) and any(len(h) == 2 for h in history.values())
        for entry_id, revisions in history.items():
            assert list(reads.entry(entry_id).revisions) == revisions
        pairs = [(v.id, v.revision) for h in history.values() for v in h][::-1]
        assert reads.revisions(pairs) == [v for h in history.values() for v in h][::-1]
        listed = reads.sources()
    assert {s.key for s in listed} == set(sources)
    for s in listed:  # the counts are checked against the entries the models hold
        assert s.entries == sum(v.source == s.key for v in want)
        assert s.to_dict() == {**sources[s.key].to_dict(), "entries": s.entries}


def test_priors_and_traces_equal_the_sqlalchemy_route(
    registry: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ledger = Ledger.open(str(registry))
    want = {p.prior.label: p.to_dict() for p in ledger.priors()}
    traces = {label: trace_prior(ledger, label) for label in want}
    without_ledger(monkeypatch)
    with reading(str(registry)) as reads:
        for label, doc in want.items():
            assert get_prior(reads, label).to_dict() == doc
            assert trace_prior(reads, label) == traces[label]
    # staleness comes from the rows read, not from the stored result
    assert all(doc["stale"] for doc in want.values())


@pytest.mark.parametrize("name", ["lab #2?.db", "relative"])
def test_any_file_name_is_read_with_sqlite3(
    registry: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, name: str
) -> None:
    """A name with URI characters, and a relative sqlite:/// URL, take the sqlite3 route."""
    copy = tmp_path / ("r.db" if name == "relative" else name)
    copy.write_bytes(registry.read_bytes())
    monkeypatch.chdir(tmp_path)
    where = "sqlite:///r.db" if name == "relative" else str(copy)
    with Ledger.open(str(registry)).reading() as reads:
        want = reads.entries(include_retracted=True)
    without_ledger(monkeypatch)
    with reading(where) as reads:
        assert reads.entries(include_retracted=True) == want


@pytest.mark.parametrize("limit", [1, 3, 1000])
def test_pages_partition_the_listing(registry: Path, limit: int) -> None:
    with reading(str(registry)) as reads:
        every = reads.entries(include_retracted=True)
        pages = [
            reads.entries(include_retracted=True, limit=limit, offset=start)
            for start in range(0, len(every), limit)
        ]
        tagged = reads.entries(tags=[every[0].tags[0]], include_retracted=True, limit=limit)
    assert [e for page in pages for e in page] == every
    assert tagged == [e for e in every if every[0].tags[0] in e.tags][:limit]


def test_a_long_id_list_is_read_in_chunks(registry: Path) -> None:
    with reading(str(registry)) as reads:
        every = reads.entries(include_retracted=True)
        wanted = [e.id for e in every] + list(range(10_000, 12_000))  # more ids than a chunk
        assert reads.entries(ids=wanted, include_retracted=True) == every
        assert reads.entries(ids=wanted, include_retracted=True, limit=2, offset=1) == every[1:3]


def test_a_registry_that_is_not_up_to_date_is_read_through_a_ledger(
    registry_url: str, tmp_path: Path
) -> None:
    """A missing file is created and migrated (as every command does), PostgreSQL is read
    through SQLAlchemy, and neither leaves a draft file behind."""
    with reading(registry_url) as reads:
        assert reads.entries() == [] and reads.sources() == [] and reads.priors() == []
    if "://" not in registry_url:
        assert [p.name for p in Path(registry_url).parent.iterdir()] == [Path(registry_url).name]


def test_a_file_that_is_not_a_registry_is_one_error(tmp_path: Path) -> None:
    path = tmp_path / "notes.db"
    path.write_text("not a database\n" * 200)
    before = path.read_bytes()
    with pytest.raises(InputError, match=r"notes\.db"), reading(str(path)):
        pass
    assert path.read_bytes() == before


@pytest.mark.parametrize(
    "args",
    [
        ["entries"],
        ["entries", "--json"],
        ["sources"],
        ["priors"],
        ["prior", "falls-control-rate"],
        ["trace", "falls-programme-effect", "--json"],
    ],
)
def test_read_commands_do_not_load_sqlalchemy(registry: Path, args: list[str]) -> None:
    code = (
        "import sys\nfrom registry.cli.app import main\n"
        f"sys.argv = ['priorledger', *{args!r}, '--db', {str(registry)!r}]\n"
        "try:\n    main()\nexcept SystemExit as end:\n    assert not end.code, end.code\n"
        "print('LOADED', 'sqlalchemy' in sys.modules)"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert "LOADED False" in done.stdout, done.stdout + done.stderr


def test_a_table_off_a_terminal_is_plain_aligned_columns() -> None:
    table = Listing("id", "source", "notes")
    table.add_row("7", "a-very-long-source-key-2019", "line one\nline two")
    table.add_row("12", "b", "")
    header, first, second = table.plain().splitlines()
    starts = [header.index("source"), header.index("notes")]
    assert [first.index("a-very"), first.index("line one line two")] == starts
    assert second.startswith("12  ") and second.index("b") == starts[0]
    assert second == second.rstrip()
