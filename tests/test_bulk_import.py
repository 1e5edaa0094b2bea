"""The bulk import (issue 13): a large sheet, in the test-sized form of 20,000 rows, stores
exactly what the single-row API derives from each row, all or nothing. The rows are invented
(mixed measures and reported forms, made by a seeded generator), not the demo's; the
formulas checked by hand are the Cochrane Handbook v6 (section 6.3.1: se from a 95 % interval
and from a mean's SD) and the large-sample variance of a logit (common practice)."""

from __future__ import annotations

import csv
import json
import math
import random
import sqlite3
from pathlib import Path

import pytest
from scipy import stats
from sqlalchemy import event, select, text

from registry.errors import InputError
from registry.evidence import sheets
from registry.evidence.sheets import parse_row
from registry.storage.ledger import ImportReport, Ledger
from registry.storage.models import Entry, EntryRevision

ROWS = 20_000
HEADER = [
    "row_key", "source", "study", "quantity", "measure", "estimate", "lower", "upper", "se",
    "p", "events", "total", "mean", "sd", "n", "tags", "design", "notes", "x_batch",
]  # fmt: skip
# Rows at the end that repeat rows of the first chunk, cell for cell (without a key).
REPEATS = 5
TABLES = ("sources", "studies", "imports", "entries", "entry_revisions", "entry_tags")


def _numbers(kind: int, rng: random.Random) -> tuple[str, dict[str, str]]:
    """A measure and one reported form of it, as a paper would print the numbers."""
    if kind == 0:  # odds ratio with a 95 % interval
        est = rng.uniform(0.4, 3.0)
        return "odds_ratio", {
            "estimate": f"{est:.2f}",
            "lower": f"{est * rng.uniform(0.4, 0.9):.2f}",
            "upper": f"{est / rng.uniform(0.4, 0.9):.2f}",
        }
    if kind == 1:  # a proportion from events and total, zero events now and then
        total = rng.randint(10, 400)
        events = rng.choice((0, rng.randint(0, total)))
        return "proportion", {"events": str(events), "total": str(total)}
    if kind == 2:  # a mean with its SD and size
        return "mean", {
            "mean": f"{rng.uniform(-20, 80):.1f}",
            "sd": f"{rng.uniform(1, 30):.2f}",
            "n": str(rng.randint(5, 900)),
        }
    if kind == 3:  # a risk ratio with a p-value, sometimes printed as a bound
        p = rng.choice(("<0.001", "p=0.03", f"{rng.uniform(0.001, 0.9):.3f}"))
        return "risk_ratio", {"estimate": f"{rng.uniform(1.05, 4.0):.2f}", "p": p}
    if kind == 4:  # a proportion and its interval as percentages
        est = rng.uniform(10, 80)
        return "proportion", {
            "estimate": f"{est:.1f}%",
            "lower": f"{est * 0.8:.1f}%",
            "upper": f"{est * 1.1:.1f}%",
        }
    return "mean_difference", {  # an estimate with its standard error
        "estimate": f"{rng.uniform(-9, 9):.2f}",
        "se": f"{rng.uniform(0.1, 3):.3f}",
    }


def invented_rows(count: int, seed: int = 13) -> list[dict[str, str]]:
    """`count` invented sheet rows (the last `REPEATS` repeat unkeyed rows of the first 100)."""
    rng = random.Random(seed)
    rows = []
    for i in range(count - REPEATS):
        measure, numbers = _numbers(i % 6, rng)
        rows.append(
            {
                "row_key": f"r{i}" if i % 2 == 0 else "",
                "source": f"inv{i % 37}",
                "study": f"TRIAL-{i % 11}" if i % 5 == 0 else "",
                "quantity": f"q{i % 23}-{i}",  # no two rows alike by chance
                "measure": measure,
                **numbers,
                "tags": ";".join(rng.sample(["adults", "rct", "europe", "pilot"], i % 3)),
                "design": rng.choice(("", "rct", "cohort")),
                "notes": f"Table {i % 7}" if i % 4 else "",
                "x_batch": f"b{i % 3}" if i % 9 == 0 else "",
            }
        )
    rows += [dict(rows[i]) for i in range(1, 2 * REPEATS, 2)]  # odd rows have no key
    return rows


def write(path: Path, rows: list[dict[str, str]]) -> Path:
    with path.open("w", newline="") as handle:
        writer = csv.DictWriter(handle, HEADER, restval="")
        writer.writeheader()
        writer.writerows(rows)
    return path


def reference(rows: list[dict[str, str]]) -> dict[int, object]:
    """Each row parsed on its own by the single-row API, by sheet row; a row repeating an
    earlier one is left out (it adds no entry)."""
    parsed, seen = {}, set()
    for number, cells in enumerate(rows, start=2):
        row = parse_row({k: v for k, v in cells.items() if v != ""})
        if row.fingerprint not in seen:
            seen.add(row.fingerprint)
            parsed[number] = row
    return parsed


def stored(ledger: Ledger) -> dict[int, tuple]:
    """Every stored entry's current revision by the sheet row it came from."""
    views = {v.id: v for v in ledger.entries()}
    with ledger.session() as session:
        places = session.execute(
            select(Entry.id, Entry.row, EntryRevision.identity, EntryRevision.reason).join(
                EntryRevision, EntryRevision.entry_id == Entry.id
            )
        ).all()
    return {row: (views[entry], identity, reason) for entry, row, identity, reason in places}


def snapshot(ledger: Ledger) -> dict[str, list]:
    """Every row of the tables an import writes, in a fixed order."""
    with ledger.engine.connect() as connection:
        return {
            t: [tuple(r) for r in connection.execute(text(f"SELECT * FROM {t} ORDER BY 1, 2"))]
            for t in TABLES
        }


@pytest.fixture(scope="module")
def rows() -> list[dict[str, str]]:
    return invented_rows(ROWS)


@pytest.fixture
def first(ledger: Ledger, tmp_path: Path, rows: list[dict[str, str]]) -> ImportReport:
    """The invented rows imported as big.csv into a new registry."""
    return ledger.import_sheet(write(tmp_path / "big.csv", rows), create_sources=True)


def test_bulk_import_stores_what_each_row_derives_on_its_own(
    ledger: Ledger, first: ImportReport, rows: list[dict[str, str]]
) -> None:
    report, expected = first, reference(rows)
    assert report.rows == ROWS and len(report.added) == len(expected) == ROWS - REPEATS
    repeats = report.planned("present")
    assert [(p.row, p.entry, p.note) for p in repeats] == [
        (ROWS - REPEATS + 2 + k, None, f"same as row {2 * k + 3}") for k in range(REPEATS)
    ]
    got = stored(ledger)
    assert sorted(got) == sorted(expected)
    for number, row in expected.items():
        view, identity, reason = got[number]
        assert (view.source, view.study, view.quantity, view.measure) == (
            row.source, row.study, row.quantity, row.measure,
        )  # fmt: skip
        # bit for bit: == on floats
        assert (view.y, view.se, view.scale, view.conversion) == (
            row.derived.y, row.derived.se, row.derived.scale, row.derived.conversion,
        )  # fmt: skip
        assert view.corrections == row.derived.corrections and identity == row.fingerprint
        assert (view.reported, view.context, view.tags, view.extra) == (
            row.reported, row.context, row.tags, row.extra,
        )  # fmt: skip
        assert reason == f"imported from big.csv row {number}"


def test_stored_numbers_follow_the_handbook_formulas(
    ledger: Ledger, tmp_path: Path, rows: list[dict[str, str]]
) -> None:
    """Independent of the code: se from a 95 % interval of a ratio, (ln U - ln L) / 3.92
    with z = Φ⁻¹(0.975) from scipy; se of a mean, sd / √n (Cochrane Handbook v6 §6.3.1);
    a logit's variance 1/e + 1/(n - e), 0.5 added with no events (common practice)."""
    part = rows[:3000]
    ledger.import_sheet(write(tmp_path / "part.csv", part), create_sources=True)
    got = stored(ledger)
    z = stats.norm.isf(0.025)
    checked = 0
    for number, cells in enumerate(part, start=2):
        if number not in got:
            continue
        view = got[number][0]
        if cells["measure"] == "odds_ratio":
            lo, hi = float(cells["lower"]), float(cells["upper"])
            assert view.y == pytest.approx(math.log(float(cells["estimate"])), rel=1e-12)
            assert view.se == pytest.approx((math.log(hi) - math.log(lo)) / (2 * z), rel=1e-12)
        elif cells["measure"] == "mean":
            assert view.y == float(cells["mean"])
            se = float(cells["sd"]) / math.sqrt(float(cells["n"]))
            assert view.se == pytest.approx(se, rel=1e-12)
        elif cells.get("events"):
            e, n = float(cells["events"]), float(cells["total"])
            if e in (0, n):
                e, n = e + 0.5, n + 1
            assert view.y == pytest.approx(math.log(e / (n - e)), rel=1e-12, abs=1e-15)
            assert view.se == pytest.approx(math.sqrt(1 / e + 1 / (n - e)), rel=1e-12)
        else:
            continue
        checked += 1
    assert checked > 1000


def test_a_bad_last_row_writes_nothing_and_is_named(
    ledger: Ledger, tmp_path: Path, rows: list[dict[str, str]]
) -> None:
    ledger.import_sheet(write(tmp_path / "first.csv", rows[:50]), create_sources=True)
    file = Path(ledger.engine.url.database or "")
    before, before_bytes = snapshot(ledger), file.read_bytes() if file.is_file() else b""
    numbers = dict.fromkeys(HEADER[5:15], "")
    last = {**rows[-1], **numbers, "measure": "odds_ratio", "estimate": "1.5", "upper": "2.5"}
    bad = [*rows[:-1], {**last, "lower": "9.5"}]  # lower above the estimate
    sheet = write(tmp_path / "bad.csv", [{**r, "source": f"new-{r['source']}"} for r in bad])
    with pytest.raises(InputError) as raised:
        ledger.import_sheet(sheet, create_sources=True)
    where = (raised.value.path, raised.value.row, raised.value.field)
    assert where == (str(sheet), ROWS + 1, "lower")
    assert f"row {ROWS + 1}" in str(raised.value)
    assert snapshot(ledger) == before
    if file.is_file():  # SQLite: the file itself is unchanged
        assert file.read_bytes() == before_bytes
    dry = ledger.import_sheet(write(tmp_path / "good.csv", rows), dry_run=True)
    assert dry.plan.count("add") == ROWS - REPEATS - 50 and dry.added == ()
    assert snapshot(ledger) == before


def test_reimport_adds_nothing_and_a_keyed_one_revises_only_changed_rows(
    ledger: Ledger, first: ImportReport, tmp_path: Path, rows: list[dict[str, str]]
) -> None:
    before = snapshot(ledger)
    again = ledger.import_sheet(tmp_path / "big.csv")
    assert again.added == () and again.plan.count("present") == ROWS
    assert snapshot(ledger) == before
    changed = {i for i in range(0, ROWS - REPEATS, 2) if i % 1000 == 0}  # keyed rows
    fixed = [dict(r) for r in rows]
    for i in changed:
        fixed[i]["notes"] = "corrected from the erratum"
    report = ledger.import_sheet(write(tmp_path / "fixed.csv", fixed), reason="erratum")
    assert [p.row for p in report.planned("revise")] == sorted(i + 2 for i in changed)
    assert report.plan.count("present") == ROWS - len(changed) and report.added == ()
    by_row = dict(zip(sorted(reference(rows)), first.added, strict=True))
    for i in changed:
        history = ledger.entry(by_row[i + 2])
        assert [r.revision for r in history.revisions] == [1, 2]
        assert history.current.context["notes"] == "corrected from the erratum"
        assert history.current.reason == "erratum"
        assert history.current.y == history.revisions[0].y


def test_no_statement_has_a_parameter_per_row(db_path: Path, tmp_path: Path) -> None:
    """40,000 rows import with SQLite's variable limit at 999 (its default before 3.32; the
    one-statement planning this replaces needed one variable a row)."""
    ledger = Ledger.open(str(db_path))

    @event.listens_for(ledger.engine, "connect")
    def limit(connection: sqlite3.Connection, _record: object) -> None:
        connection.setlimit(sqlite3.SQLITE_LIMIT_VARIABLE_NUMBER, 999)

    rows = invented_rows(40_000, seed=14)
    report = ledger.import_sheet(write(tmp_path / "wide.csv", rows), create_sources=True)
    assert len(report.added) == 40_000 - REPEATS
    assert ledger.import_sheet(write(tmp_path / "wide.csv", rows)).added == ()


def test_a_key_repeated_far_down_the_sheet_is_named(ledger: Ledger, tmp_path: Path) -> None:
    rows = invented_rows(ROWS)
    rows[ROWS - 100]["row_key"] = rows[0]["row_key"]
    with pytest.raises(InputError, match="row_key 'r0' is also on row 2") as raised:
        ledger.import_sheet(write(tmp_path / "keys.csv", rows), create_sources=True)
    assert (raised.value.row, raised.value.field) == (ROWS - 98, "row_key")
    assert ledger.entries() == [] and ledger.sources() == []


def test_keys_that_only_share_a_hash_are_not_a_repeat(
    db_path: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setattr(sheets, "hash", lambda key: 0, raising=False)  # every key collides
    rows = invented_rows(60)
    report = Ledger.open(str(db_path)).import_sheet(write(tmp_path / "few.csv", rows))
    assert len(report.added) == 60 - REPEATS


def test_the_import_command_lists_fifty_revised_rows_and_counts_the_rest(
    cli, db_path: Path, tmp_path: Path
) -> None:  # type: ignore[no-untyped-def]
    rows = [r for r in invented_rows(200) if r["row_key"]][:60]
    assert cli("import", write(tmp_path / "a.csv", rows), "--db", db_path).code == 0
    fixed = [{**r, "notes": "corrected"} for r in rows]
    done = cli("import", write(tmp_path / "b.csv", fixed), "--db", db_path)
    assert done.code == 0 and "revised 60" in done.stderr
    assert done.stderr.count(" revises entry ") == 50
    assert "... and 10 more such rows (--json lists every row)" in done.stderr
    back = cli("import", write(tmp_path / "c.csv", rows), "--db", db_path, "--json")
    assert len(json.loads(back.stdout)["rows_not_reverted"]) == 60  # back to revision 1
