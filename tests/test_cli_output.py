"""What the command line prints: piped output whole, user text verbatim, bugs and bad usage
reported in one line with their exit codes, and `--help` in words a person would write."""

from __future__ import annotations

import json
import os
import re
import subprocess
import tempfile
from pathlib import Path

import pytest
import typer
from typer.core import TyperGroup

from registry.cli.app import app
from registry.demo import DEFINITIONS
from tests.conftest import write_sheet

README = Path(__file__).resolve().parents[1] / "README.md"


def run_to_file(*args: str, out: Path) -> str:
    """Run the installed command as `priorledger ARGS > out` and return what it wrote.

    COLUMNS is set narrow on purpose: a redirected output must not follow it.
    """
    with out.open("w") as handle:
        done = subprocess.run(
            ["priorledger", *args],
            stdout=handle,
            stderr=subprocess.PIPE,
            text=True,
            env={**os.environ, "NO_COLOR": "1", "COLUMNS": "60"},
            timeout=600,
        )
    assert done.returncode == 0, done.stderr
    return out.read_text()


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    """The demo's registry and its output, redirected to a file."""
    folder = tmp_path_factory.mktemp("demo")
    db = folder / "demo.db"
    return db, run_to_file("demo", "--db", str(db), out=folder / "out.txt")


def code_block(text: str, title: str) -> str:
    """The lines after the rule titled `title`, up to the next rule or the end."""
    lines = text.splitlines()
    (start,) = [i for i, line in enumerate(lines) if line.startswith("─") and f" {title} " in line]
    block = []
    for line in lines[start + 1 :]:
        if line.startswith("─"):
            break
        block.append(line)
    return "\n".join(block).strip("\n")


@pytest.mark.parametrize("language", ["stan", "pymc"])
def test_demo_redirected_prints_emitted_code_unbroken(
    cli, demo: tuple[Path, str], language: str
) -> None:
    db, text = demo
    for name in (Path(definition).stem for definition in DEFINITIONS):
        code = cli("emit", name, "--to", language, "--db", db)
        assert code.code == 0, code.stderr
        lines = code.stdout.splitlines()
        # Lines longer than a default 80-column page, which a wrapping console would break.
        assert max(map(len, lines)) > 80
        if language == "stan":
            assert all(line.startswith("//") for line in lines[: lines.index("parameters {")])
        assert code_block(text, f"{name}@1 — {language}") == code.stdout.strip("\n")


def test_listings_redirected_show_full_cells(cli, demo: tuple[Path, str], tmp_path: Path) -> None:
    db, _ = demo
    tables = {
        command: run_to_file(command, "--db", str(db), out=tmp_path / f"{command}.txt")
        for command in ("sources", "entries", "priors")
    }
    for text in tables.values():
        assert "…" not in text and "..." not in text
    for source in json.loads(cli("sources", "--json", "--db", db).stdout)["sources"]:
        # off a terminal a table is plain columns: the key starts its row
        (row,) = [line for line in tables["sources"].splitlines() if line.startswith(source["key"])]
        assert source["doi"] in row and source["citation"] in row


# Text that Rich would read as markup (closing tags that crash it, styles it would swallow)
# or as an emoji code; every command must print it exactly as entered.
NOTES = "notes [bold]loud[/bold] and [/x] and [/]"
CITATION = "Doe, J. (2020) [red]Title[/red] [/x]"
TAGS = ("[bold]", "t[/]")
POPULATION = "adults [/] aged 65+ :thumbs_up:"
KEY = "doe2020:thumbs_up:"
RETRACTION = "retracted [/x] by the journal [bold]"
REVISION = "typo [/] in [link=x]Table 2[/link]"
PARAMETER = "[bold]log rate ratio[/bold] of [/x] falls"
RULE = "[red]rule[/red]"
WHY = "why [/x] :thumbs_up:"

DEFINITION = f"""
name = "markup-check"
parameter = {json.dumps(PARAMETER)}
target = "mean"

[select]
quantity = "q"

[pool]
method = "common"

[[rule]]
name = {json.dumps(RULE)}
where = {{ source = {json.dumps(KEY)} }}
population = {{ level = "serious", why = {json.dumps(WHY)} }}

[output]
unit_sd = 1.0
"""


def test_user_text_round_trips_verbatim(cli, tmp_path: Path, db_path: Path) -> None:
    header = ["source", "quantity", "measure", "estimate", "se", "citation", "notes", "tags"]
    header.append("population")
    sheet = write_sheet(
        tmp_path / "s.csv",
        header,
        [KEY, "q", "mean", "1.0", "0.5", CITATION, NOTES, ";".join(TAGS), POPULATION],
        ["other2021", "q", "mean", "2.0", "0.5", "", "", "", ""],
    )
    definition = tmp_path / "markup-check.toml"
    definition.write_text(DEFINITION)
    db = ("--db", str(db_path))

    assert cli("import", sheet, "--create-sources", *db).code == 0
    built = cli("build", definition, *db)
    assert built.code == 0, built.stderr
    assert PARAMETER in built.stdout
    revised = cli("revise", "1", "--set", "estimate=1.1", "--reason", REVISION, *db)
    assert revised.code == 0, revised.stderr
    retracted = cli("sources", "retract", KEY, "--reason", RETRACTION, *db)
    assert retracted.code == 0 and RETRACTION in retracted.stderr

    shown = cli("entries", "show", "1", *db).stdout
    for text in (KEY, CITATION, NOTES, *TAGS, POPULATION, REVISION):
        assert text in shown
    sources = cli("sources", *db).stdout
    for text in (KEY, CITATION, RETRACTION):
        assert text in sources
    assert KEY in cli("entries", *db).stdout
    trace = cli("trace", "markup-check", *db).stdout
    for text in (PARAMETER, KEY, CITATION, RULE, WHY):
        assert text in trace
    assert PARAMETER in cli("prior", "markup-check", *db).stdout


def test_an_internal_error_is_one_line_naming_its_traceback_file(
    cli, monkeypatch: pytest.MonkeyPatch, tmp_path: Path, db_path: Path
) -> None:
    from registry.storage.reads import Reads

    def broken(*args: object, **kwargs: object) -> None:
        raise RuntimeError("simulated failure\non two lines")

    monkeypatch.setattr(Reads, "sources", broken)
    monkeypatch.setattr(tempfile, "tempdir", str(tmp_path))
    result = cli("sources", "--db", db_path)

    # 70 is the code the README documents for a bug (EX_SOFTWARE of BSD's sysexits.h).
    assert result.code == 70
    (contract,) = re.findall(r"\*\*Exit codes\*\*.*?\n(?=- |\n)", README.read_text(), re.S)
    assert "70" in contract and "bug" in contract
    (line,) = result.stderr.splitlines()
    assert "bug" in line and "simulated failure on two lines" in line
    (path,) = re.findall(r"\S+priorledger-crash-\S+\.txt", line)
    report = Path(path).read_text()
    assert Path(path).parent == tmp_path
    assert "Traceback" in report and "RuntimeError: simulated failure" in report
    assert "def broken" in report or "in broken" in report


@pytest.mark.parametrize(
    "args", [["pool", "--no-such-option"], ["entries", "show", "three"], ["revise", "1"]]
)
def test_a_usage_error_is_one_line_with_exit_2(cli, args: list[str]) -> None:
    result = cli(*args)
    assert result.code == 2 and result.stdout == ""
    (line,) = result.stderr.splitlines()
    assert line.startswith("error: ") and "--help" in line


def _command_paths(command: TyperGroup, path: tuple[str, ...] = ()):
    yield path
    for name, sub in getattr(command, "commands", {}).items():
        yield from _command_paths(sub, (*path, name))


@pytest.mark.parametrize("path", [" ".join(p) for p in _command_paths(typer.main.get_command(app))])
def test_help_shows_metavars_a_person_writes(cli, path: str) -> None:
    result = cli(*path.split(), "--help")
    assert result.code == 0
    assert not re.search(r"<[a-z][\w\[\], |]*>", result.stdout), result.stdout
    assert re.search(r"^ *Example: priorledger", result.stdout, re.MULTILINE), result.stdout
    description = result.stdout.split("Usage:")[1].splitlines()[2:4]
    assert any(line.strip() for line in description), result.stdout
