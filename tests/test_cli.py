"""The command line: contracts of SPEC.md, every validation rule, help, start-up cost."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from registry.cli.app import app
from registry.storage.ledger import Ledger
from tests.conftest import write_sheet

# Published worked examples as a sheet, with the expected y and se on the analysis scale.
WORKED = [
    # Borenstein, Hedges, Higgins & Rothstein (2009), Introduction to Meta-Analysis, ch. 4:
    # means 103 vs 100, SD 5.5 vs 4.5, n 50 each: g = 0.5924, V_g = 0.0411 (book values
    # recalled from memory; se = sqrt(0.041144) = 0.2028 by the book's formulas 4.18-4.24).
    (
        {
            "measure": "smd",
            "mean_a": 103,
            "sd_a": 5.5,
            "n_a": 50,
            "mean_b": 100,
            "sd_b": 4.5,
            "n_b": 50,
        },
        0.5924,
        0.2028,
    ),
    # Same example, raw mean difference: D = 3, V_D = 5.5²/50 + 4.5²/50 = 1.01 (formula 4.5).
    (
        {
            "measure": "mean_difference",
            "mean_a": 103,
            "sd_a": 5.5,
            "n_a": 50,
            "mean_b": 100,
            "sd_b": 4.5,
            "n_b": 50,
        },
        3.0,
        1.0050,
    ),
    # Borenstein et al. (2009) ch. 5: 5/100 vs 10/100 events; ln RR = -0.6931,
    # V = 1/5 - 1/100 + 1/10 - 1/100 = 0.28 (formula 5.3; recalled from memory).
    (
        {"measure": "risk_ratio", "events_a": 5, "total_a": 100, "events_b": 10, "total_b": 100},
        -0.6931,
        0.5292,
    ),
    # Same table, ln OR = ln(5·90 / (95·10)) = -0.7472, V = 1/5 + 1/95 + 1/10 + 1/90 = 0.3216.
    (
        {"measure": "odds_ratio", "events_a": 5, "total_a": 100, "events_b": 10, "total_b": 100},
        -0.7472,
        0.5671,
    ),
    # Cochrane Handbook v6 §6.3.1 (SE from a 95% CI on the log scale for ratios):
    # se = (ln 0.95 - ln 0.60) / (2 · 1.959964) = 0.1172.
    ({"measure": "hazard_ratio", "estimate": 0.75, "lower": 0.60, "upper": 0.95}, -0.2877, 0.1172),
    # Cochrane Handbook v6 §6.3.2 (SE from a two-sided p): z = Φ⁻¹(1 - 0.008/2) = 2.6521,
    # se = |ln 0.70| / 2.6521 = 0.1345.
    ({"measure": "odds_ratio", "estimate": 0.70, "p": 0.008}, -0.3567, 0.1345),
]


def sheet_of(rows: list[dict], path: Path) -> Path:
    header = ["source", "quantity", *sorted({k for r in rows for k in r})]
    body = [
        [f"ex{i}", "worked-examples"] + [r.get(k, "") for k in header[2:]]
        for i, r in enumerate(rows)
    ]
    return write_sheet(path, header, *body)


def test_worked_examples_through_import_and_json(cli, tmp_path: Path, db_path: Path) -> None:
    sheet = sheet_of([r for r, _, _ in WORKED], tmp_path / "worked.csv")
    assert cli("import", sheet, "--create-sources", "--db", db_path).code == 0
    result = cli("entries", "--json", "--db", db_path)
    entries = json.loads(result.stdout)["entries"]
    assert len(entries) == len(WORKED)
    for entry, (_, y, se) in zip(entries, WORKED, strict=True):
        assert {"id", "source", "quantity", "measure", "scale", "y", "se", "conversion"} <= set(
            entry
        )
        assert round(entry["y"], 4) == pytest.approx(y, abs=1e-4), entry
        assert round(entry["se"], 4) == pytest.approx(se, abs=1e-4), entry
    # The CLI and the library agree.
    assert [e.y for e in Ledger.open(str(db_path)).entries()] == [e["y"] for e in entries]


OK_ROW = {
    "source": "a2020",
    "quantity": "q",
    "measure": "risk_ratio",
    "estimate": "0.8",
    "lower": "0.6",
    "upper": "1.07",
}

# Each bad row (changes to OK_ROW; None removes a cell), and the column its error must name.
BAD = [
    ({"colour": "red"}, "colour", 1),
    ({"measure": None}, "measure", 1),
    ({"measure": "ratio"}, "measure", 3),
    ({"lower": "1.2", "upper": "0.6"}, "lower", 3),
    ({"estimate": "0.5", "lower": "0.6"}, "lower", 3),
    ({"estimate": "-0.8", "lower": "-0.9", "upper": "-0.1"}, "estimate", 3),
    (
        {
            "estimate": None,
            "lower": None,
            "upper": None,
            "measure": "mean_difference",
            "mean_a": "1",
            "sd_a": "-1",
            "n_a": "10",
            "mean_b": "2",
            "sd_b": "1",
            "n_b": "10",
        },
        "sd_a",
        3,
    ),
    (
        {
            "estimate": None,
            "lower": None,
            "upper": None,
            "events_a": "12",
            "total_a": "10",
            "events_b": "3",
            "total_b": "10",
        },
        "events_a",
        3,
    ),
    ({"level": "95"}, "level", 3),
    ({"lower": None, "upper": None, "p": "1.5"}, "p", 3),
    (
        {
            "estimate": None,
            "lower": None,
            "upper": None,
            "measure": "mean",
            "mean": "3",
            "sd": "1",
            "n": "1",
        },
        "n",
        3,
    ),
    ({"upper": None}, "upper", 3),
    ({"se": "0.1"}, "se", 3),
    ({"estimate": "about 0.8"}, "estimate", 3),
    ({"design": "trial"}, "design", 3),
    (
        {
            "estimate": None,
            "lower": None,
            "upper": None,
            "measure": "odds_ratio",
            "events": "3",
            "total": "10",
        },
        "measure",
        3,
    ),
    ({"source": "a key with spaces"}, "source", 3),
]


@pytest.mark.parametrize(("change", "column", "row"), BAD, ids=[c for _, c, _ in BAD])
def test_each_validation_rule(cli, tmp_path: Path, db_path: Path, change, column, row) -> None:
    cli("init", "--db", db_path)
    before = db_path.read_bytes()
    good = {**OK_ROW}
    bad = {k: v for k, v in {**OK_ROW, **change}.items() if v is not None}
    header = list(dict.fromkeys([*good, *bad]))
    if "measure" not in bad:
        header.remove("measure")
    sheet = write_sheet(
        tmp_path / "bad.csv",
        header,
        [good.get(k, "") for k in header],
        [bad.get(k, "") for k in header],
    )
    result = cli("import", sheet, "--create-sources", "--db", db_path)
    assert result.code == 2
    assert result.stdout == ""
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, result.stderr
    assert "Traceback" not in result.stderr
    assert "bad.csv" in lines[0] and f"row {row}" in lines[0] and f"'{column}'" in lines[0]
    assert db_path.read_bytes() == before


def test_import_again_says_nothing_added(cli, tmp_path: Path, db_path: Path) -> None:
    sheet = write_sheet(tmp_path / "s.csv", list(OK_ROW), list(OK_ROW.values()))
    assert "added 1 entries" in cli("import", sheet, "--create-sources", "--db", db_path).stderr
    again = cli("import", sheet, "--create-sources", "--db", db_path)
    assert again.code == 0 and "nothing added" in again.stderr


def test_revise_and_show(cli, tmp_path: Path, db_path: Path) -> None:
    sheet = write_sheet(tmp_path / "s.csv", list(OK_ROW), list(OK_ROW.values()))
    cli("import", sheet, "--create-sources", "--db", db_path)
    assert (
        cli("revise", "1", "--set", "upper=1.2", "--reason", "Table 2", "--db", db_path).code == 0
    )
    shown = json.loads(cli("entries", "show", "1", "--json", "--db", db_path).stdout)
    assert [r["reason"] for r in shown["revisions"]][1] == "Table 2"
    assert (
        shown["reported"]["upper"] == "1.2" and shown["revisions"][0]["reported"]["upper"] == "1.07"
    )
    bad = cli("revise", "1", "--set", "upper=0.7", "--reason", "x", "--db", db_path)
    assert bad.code == 2 and "'upper'" in bad.stderr and "entry 1" in bad.stderr
    missing = cli("entries", "show", "42", "--db", db_path)
    assert missing.code == 2 and "no entry with id 42" in missing.stderr


def test_sources_retract_shows_in_listing(cli, tmp_path: Path, db_path: Path) -> None:
    sheet = write_sheet(tmp_path / "s.csv", list(OK_ROW), list(OK_ROW.values()))
    cli("import", sheet, "--create-sources", "--db", db_path)
    assert (
        cli("sources", "retract", "a2020", "--reason", "journal notice", "--db", db_path).code == 0
    )
    (source,) = json.loads(cli("sources", "--json", "--db", db_path).stdout)["sources"]
    assert source["retracted"] and source["retraction_reason"] == "journal notice"
    (entry,) = json.loads(cli("entries", "--json", "--db", db_path).stdout)["entries"]
    assert entry["retracted"] is True


def _commands(group, prefix=()):
    for info in group.registered_commands:
        yield (*prefix, info.name), info.callback
    for sub in group.registered_groups:
        yield (*prefix, sub.name), sub.typer_instance.registered_callback.callback
        yield from _commands(sub.typer_instance, (*prefix, sub.name))


@pytest.mark.parametrize("name", [" ".join(n) for n, _ in _commands(app)])
def test_every_command_has_help_and_an_example(cli, name: str) -> None:
    callback = dict((" ".join(n), c) for n, c in _commands(app))[name]
    assert callback.__doc__ and "Example: priorledger" in callback.__doc__
    result = cli(*name.split(), "--help")
    assert result.code == 0 and "Example" in result.stdout


HEAVY = ("numpy", "scipy", "pandas", "matplotlib")


@pytest.mark.parametrize("args", [["--help"], ["entries", "--json"], ["sources", "--json"]])
def test_listing_commands_import_no_heavy_library(tmp_path: Path, args: list[str]) -> None:
    code = (
        "import sys\nfrom registry.cli.app import main\n"
        f"sys.argv = ['priorledger', *{args!r}, *(['--db', {str(tmp_path / 'r.db')!r}] "
        f"if {args!r} != ['--help'] else [])]\n"
        "try:\n    main()\nexcept SystemExit:\n    pass\n"
        f"print('HEAVY', [m for m in {HEAVY!r} if m in sys.modules])"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert "HEAVY []" in done.stdout, done.stdout + done.stderr
