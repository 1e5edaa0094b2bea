"""The reviewer's report, diff, trace and verify over a registry.

The report is checked as a document (html5lib, a well-kept HTML5 parser) and in a real
browser (Debian's chromium, installed in CI by .ci/browser.sh); summaries in the diff are
checked against scipy's normal distribution.
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import pytest
from scipy import stats

from registry.demo import run_demo, seed_path
from registry.evidence.convert import conversion_source
from registry.priors.definition import load_definition
from registry.priors.diff import diff_priors
from registry.priors.store import build_prior, selection, trace_prior
from registry.report.html import write_report
from registry.storage.ledger import Ledger
from tests.test_priors import BASE, bcg, definition_file  # noqa: F401 (bcg is a fixture)

DEMO_PRIOR = "falls-programme-effect"
REASONS = ("typo: Table 2 gives 123 events", "re-checked against the erratum, 2021")


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> tuple[Ledger, Path, str]:
    """The invented demo, with one entry of the programme's prior revised twice, rebuilt,
    and its report written once for the tests below."""
    folder = tmp_path_factory.mktemp("demo")
    ledger = Ledger.open(str(folder / "demo.db"))
    run = run_demo(ledger, folder)
    built = next(s for s in run.built if s.prior.name == DEMO_PRIOR)
    entry = built.uses[0].id
    ledger.revise(entry, {"events_a": "123"}, REASONS[0], user="reviewer-a")
    ledger.revise(entry, {"events_a": "121"}, REASONS[1], user="reviewer-b")
    definition = load_definition(seed_path("falls-programme-effect.toml"))
    rebuilt = build_prior(ledger, definition, user="curator-x")
    assert rebuilt.new and rebuilt.created_by == "curator-x"
    report = folder / "report.html"
    write_report(ledger, rebuilt.prior.label, report, languages=["stan", "pymc"])
    return ledger, report, rebuilt.prior.label


def test_report_is_html5_with_no_network_resource(demo) -> None:
    import html5lib

    _, report, _ = demo
    text = report.read_text()
    document = html5lib.HTMLParser(strict=True, namespaceHTMLElements=False).parse(text)
    for element in document.iter():
        for name, value in element.attrib.items():
            if element.tag == "a" and name == "href":
                # links to the documents a DOI names: a reader may open them, the page loads
                # nothing from them
                assert value.startswith("https://doi.org/10.5555/"), value
            elif "://" in value:
                pytest.fail(f"<{element.tag} {name}={value!r}> refers to a network resource")
    assert "http://" not in text
    assert text.count("https://") == text.count('href="https://doi.org/')
    assert "<script" not in text and "@import" not in text and "url(" not in text


def test_report_holds_every_number_a_reviewer_follows(demo) -> None:
    ledger, report, label = demo
    text = report.read_text()
    trace = trace_prior(ledger, label)
    assert trace["digest"] in text
    assert "curator-x" in text and "reviewer-a" in text
    for entry in trace["entries"]:
        assert f'id="entry-{entry["id"]}"' in text
        assert entry["source"]["doi"] in text
        for revision in entry["revisions"]:
            assert _escaped(revision["reason"]) in text
        assert _escaped(conversion_source(entry["conversion"])) in text
    for left in trace["left_out"]:
        assert _escaped("; ".join(left["reasons"])) in text
    for reason in REASONS:
        assert _escaped(reason) in text
    assert "verified: rebuilt with the same digest and components" in text


def _escaped(text: str) -> str:
    import html

    return html.escape(text)


@pytest.mark.skipif(shutil.which("chromium") is None, reason="chromium is not installed")
def test_report_renders_in_headless_chromium(demo, tmp_path: Path) -> None:
    from matplotlib.image import imread

    _, report, _ = demo
    shot = tmp_path / "report.png"
    subprocess.run(
        [
            "chromium",
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-quic",
            "--no-first-run",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            f"--user-data-dir={tmp_path / 'profile'}",
            f"--screenshot={shot}",
            "--window-size=1200,3000",
            report.resolve().as_uri(),
        ],
        check=True,
        capture_output=True,
        timeout=180,
    )
    pixels = imread(shot)
    assert pixels.shape[:2] == (3000, 1200)
    colours = {tuple(p) for p in pixels[::7, ::7, :3].reshape(-1, 3).round(2).tolist()}
    # a blank page has one colour; text, tables and two figures give many
    assert len(colours) > 50
    assert pixels[..., :3].std() > 0.05


def test_trace_lists_every_revision_and_its_reason(demo, cli) -> None:
    ledger, _, label = demo
    db = ledger.url.removeprefix("sqlite:///")
    result = cli("trace", label, "--db", db)
    assert result.code == 0
    assert "imported from falls-sheet.csv" in result.stdout
    for reason in REASONS:
        assert reason in result.stdout
    assert "left out by the selection" in result.stdout
    assert "another report of study INV-TRIAL-ALDREN" in result.stdout
    chosen = selection(ledger, load_definition(seed_path("falls-control-rate.toml")))
    assert [(x.id, x.reasons) for x in chosen.left_out] == [
        (19, ("excluded by id (select.exclude lists 19)",))
    ]
    doc = json.loads(cli("trace", label, "--db", db, "--json").stdout)
    revised = next(e for e in doc["entries"] if len(e["revisions"]) == 3)
    assert [r["created_by"] for r in revised["revisions"][1:]] == ["reviewer-a", "reviewer-b"]


DISCOUNTED = BASE.replace('mechanism = "none"', 'mechanism = "both"')


def _summary_from_scipy(doc: dict) -> tuple[float, float, float, float]:
    (component,) = doc["components"]
    dist = stats.norm(component["loc"], component["scale"])
    return dist.mean(), dist.std(), dist.ppf(0.025), dist.ppf(0.975)


def test_diff_of_one_rating_lists_that_rating_and_the_summaries(
    bcg: Path,  # noqa: F811
    tmp_path: Path,
    cli,
) -> None:
    first = definition_file(tmp_path, DISCOUNTED, "one.toml")
    assert cli("build", first, "--db", bcg, "--user", "analyst-1").code == 0
    second = definition_file(
        tmp_path,
        DISCOUNTED + '\n[override.3]\npopulation = { level = "serious", why = "a different '
        'population" }\n',
        "two.toml",
    )
    assert cli("build", second, "--db", bcg).code == 0
    result = cli("diff", "bcg@1", "bcg@2", "--db", bcg, "--json")
    assert result.code == 0
    doc = json.loads(result.stdout)
    assert not doc["identical"]
    assert [(c["id"], c["key"]) for c in doc["ratings"]] == [(3, "rating population")]
    assert doc["ratings"][0]["after"].startswith("serious (override for entry 3")
    assert {c["id"] for c in doc["discounts"]} == {3}
    assert [c["key"] for c in doc["definition"]] == ["override"]
    assert not doc["entries_added"] and not doc["entries_removed"]
    ledger = Ledger.open(str(bcg))
    for side, label in (("summary_before", "bcg@1"), ("summary_after", "bcg@2")):
        stored = json.loads(cli("prior", label, "--db", bcg, "--json").stdout)
        got = doc[side]
        assert (got["mean"], got["sd"], *got["interval_95"]) == pytest.approx(
            _summary_from_scipy(stored), rel=1e-9
        )
    assert doc["summary_before"]["mean"] != doc["summary_after"]["mean"]
    text = cli("diff", "bcg@1", "bcg@2", "--db", bcg).stdout
    assert "entry 3: rating population" in text
    assert text.count("rating ") == 1
    assert "before: " in text and "after: " in text
    assert diff_priors(ledger, "bcg@1", "bcg@2").summaries[1].ess["variance_match"] is not None


def test_diff_of_identical_versions_says_so(bcg: Path, tmp_path: Path, cli) -> None:  # noqa: F811
    assert cli("build", definition_file(tmp_path), "--db", bcg).code == 0
    result = cli("diff", "bcg@1", "bcg", "--db", bcg)
    assert result.code == 0
    assert "identical" in result.stdout
    doc = json.loads(cli("diff", "bcg@1", "bcg@1", "--db", bcg, "--json").stdout)
    assert doc["identical"] and doc["ratings"] == [] and doc["definition"] == []


def test_verify_names_what_changed_in_one_line_each(
    bcg: Path,  # noqa: F811
    tmp_path: Path,
    cli,
) -> None:
    from sqlalchemy import update

    from registry.storage.models import PriorEntry

    assert cli("build", definition_file(tmp_path, DISCOUNTED), "--db", bcg).code == 0
    ledger = Ledger.open(str(bcg))
    with ledger.transaction() as session:  # tamper with one stored share
        session.execute(update(PriorEntry).where(PriorEntry.position == 2).values(weight=0.5))
    result = cli("verify", "bcg", "--db", bcg)
    assert result.code == 1
    lines = [x for x in result.stdout.splitlines() if x.startswith("  ")]
    assert lines == [f"  entry 3 revision 1: weight 0.5 -> {_share(ledger)} (stored -> rebuilt)"]
    assert "{" not in result.stdout and "{" not in result.stderr


def _share(ledger: Ledger) -> str:
    from registry.priors.store import verify_prior

    return repr(verify_prior(ledger, "bcg").rebuilt.rated[2].share)


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (("report", "bcg", "--out", "no/such/folder/r.html"), "folder no/such/folder"),
        (("report", "nothing", "--out", "r.html"), "no prior 'nothing'"),
        (("report", "bcg@9", "--out", "r.html"), "no prior 'bcg@9'"),
        (("diff", "bcg@1", "bcg@9"), "no prior 'bcg@9'"),
        (("diff", "nothing@1", "bcg@1"), "no prior 'nothing@1'"),
        (("report", "bcg", "--out", "r.html", "--languages", "cobol"), "unknown language"),
    ],
)
def test_bad_input_exits_2_with_one_line(
    bcg: Path,  # noqa: F811
    tmp_path: Path,
    cli,
    monkeypatch: pytest.MonkeyPatch,
    args: tuple[str, ...],
    message: str,
) -> None:
    assert cli("build", definition_file(tmp_path), "--db", bcg).code == 0
    monkeypatch.chdir(tmp_path)
    result = cli(*args, "--db", bcg)
    assert result.code == 2
    assert result.stdout == ""
    assert len(result.stderr.strip().splitlines()) == 1 and message in result.stderr


def test_every_write_records_who(bcg: Path, tmp_path: Path, cli, monkeypatch) -> None:  # noqa: F811
    import getpass

    monkeypatch.delenv("PRIORLEDGER_USER", raising=False)
    ledger = Ledger.open(str(bcg))
    assert {s.created_by for s in ledger.sources()} == {getpass.getuser()}
    monkeypatch.setenv("PRIORLEDGER_USER", "from-env")
    assert cli("revise", "1", "--set", "events_a=5", "--reason", "r", "--db", bcg).code == 0
    assert ledger.entry(1).current.created_by == "from-env"
    retract = ("sources", "retract", "bcg01", "--reason", "x", "--user", "given", "--db", bcg)
    assert cli(*retract).code == 0
    source = next(s for s in ledger.sources() if s.key == "bcg01")
    assert source.retracted_by == "given" and source.retracted_at is not None
    assert cli("build", definition_file(tmp_path), "--db", bcg).code == 0
    doc = json.loads(cli("prior", "bcg", "--db", bcg, "--json").stdout)
    assert doc["created_by"] == "from-env" and doc["created_at"]


def test_every_conversion_in_the_evidence_tests_has_a_published_source() -> None:
    """The conversion -> source table covers every conversion the worked examples and the
    reference-library cases of tests/test_evidence.py produce."""
    from registry.evidence.convert import derive
    from tests.test_evidence import PUBLISHED, REFERENCES, WAN_CASES

    names = {derive(c.measure, c.reported).conversion for c in (*PUBLISHED, *REFERENCES)}
    names |= {derive("mean", reported).conversion for _, reported in WAN_CASES}
    assert len(names) > 10
    missing = sorted(n for n in names if conversion_source(n) is None)
    assert missing == []
