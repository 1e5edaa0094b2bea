"""The reviewer's report, diff, trace and verify over a registry.

The report is checked as a document (html5lib, a well-kept HTML5 parser) and in a real
browser (Debian's chromium, installed in CI by .ci/browser.sh); summaries in the diff are
checked against scipy's normal distribution. The checks in the report are built on the BCG
trials (Colditz et al. 1994, JAMA 271:698; counts in tests/test_frequentist.py): the risk of
tuberculosis in the unvaccinated arms (a proportion) and the log risk ratio.
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
from tests.conftest import write_sheet
from tests.test_frequentist import BCG_COUNTS, SE, Y
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


CONTROL_RISK = """
name = "bcg-control"
parameter = "risk of tuberculosis without vaccination"
target = "mean"
[select]
quantity = "bcg-control-tb-risk"
[pool]
method = "common"
[discount]
mechanism = "none"
[output]
plausible = [0.001, 0.05]
"""


@pytest.fixture
def bcg_checked(bcg: Path, tmp_path: Path, cli) -> Path:  # noqa: F811
    """The BCG registry with two common-effect priors: the log risk ratio (`bcg`) and the
    risk in the unvaccinated arms (`bcg-control`, events out of participants)."""
    rows = [
        [f"bcg{i:02d}", "bcg-control-tb-risk", "proportion", c, c + d, "Table 1"]
        for i, (_, _, c, d) in enumerate(BCG_COUNTS)
    ]
    header = ["source", "quantity", "measure", "events", "total", "location"]
    sheet = write_sheet(tmp_path / "control.csv", header, *rows)
    assert cli("import", sheet, "--db", bcg).code == 0
    for text, name in ((BASE, "bcg.toml"), (CONTROL_RISK, "control.toml")):
        assert cli("build", definition_file(tmp_path, text, name), "--db", bcg).code == 0
    return bcg


def _section(text: str, section: str) -> tuple[dict[str, str], list[list[str]], list[str]]:
    """A section of the report: its label -> value rows, its tables' data rows, its images."""
    import html5lib

    document = html5lib.parse(text, namespaceHTMLElements=False)
    (found,) = document.iterfind(f".//section[@id='{section}']")
    labelled, rows = {}, []
    for row in found.iterfind(".//tr"):
        cells = ["".join(c.itertext()) for c in row]
        if row[0].tag == "th" and len(cells) == 2:
            labelled[cells[0]] = cells[1]
        elif row[0].tag == "td":
            rows.append(cells)
    return labelled, rows, [img.get("src") for img in found.iterfind(".//img")]


@pytest.mark.parametrize(
    ("label", "size", "result"),
    [
        ("bcg-control", ("--n", "500"), ("--events", "9")),
        ("bcg", ("--se", "0.2"), ("--estimate", "-0.1")),
    ],
)
def test_report_with_new_data_shows_predict_and_update(
    bcg_checked: Path, tmp_path: Path, cli, label: str, size: tuple, result: tuple
) -> None:
    db = ("--db", bcg_checked)
    out = tmp_path / "checked.html"
    assert cli("report", label, "--out", out, *size, *result, *db).code == 0
    text = out.read_text()
    predicted = json.loads(cli("predict", label, *size, "--json", *db).stdout)
    updated = json.loads(cli("update", label, *size, *result, "--json", *db).stdout)

    rows, _, images = _section(text, "prior-predictive")
    assert rows["mean"] == f"{predicted['mean']:.6g}"
    assert rows["sd"] == f"{predicted['sd']:.6g}"
    for q, value in predicted["quantiles"].items():
        assert rows[f"{float(q):.1%} quantile"] == f"{value:.6g}"
    if predicted["plausible_range"] is None:  # the BCG definition sets no plausible range
        assert rows["plausible range"].startswith("none: ")
    else:
        lo, hi = predicted["plausible_range"]
        assert rows[f"P({lo:g} <= result <= {hi:g}), the plausible range"] == (
            f"{predicted['plausible']:.6g}"
        )
    assert rows["method"] == predicted["method"]
    assert rows["accuracy"] == f"{predicted['accuracy']:.6g}"
    assert len(images) == 1 and images[0].startswith("data:image/svg+xml;base64,")

    rows, weights, images = _section(text, "posterior")
    posterior, conflict = updated["posterior"], updated["conflict"]
    assert rows["mean"] == f"{posterior['mean']:.6g}"
    assert rows["sd"] == f"{posterior['sd']:.6g}"
    for q, value in posterior["quantiles"].items():
        assert rows[f"{float(q):.1%} quantile"] == f"{value:.6g}"
    assert rows["method"] == posterior["method"]
    assert rows["accuracy"] == f"{posterior['accuracy']:.6g}"
    assert [(w[3], w[4]) for w in weights] == [
        (f"{a:.6g}", f"{b:.6g}")
        for a, b in zip(updated["weights"]["prior"], updated["weights"]["posterior"], strict=True)
    ]
    assert len(images) == 1 and images[0].startswith("data:image/svg+xml;base64,")

    rows, _, _ = _section(text, "conflict")
    assert rows["tail probability (p-value)"] == f"{conflict['p_value']:.6g}"
    assert rows["method"] == conflict["method"] and rows["method"].startswith("Box (1980)")
    assert rows["prior predictive"] == conflict["predictive"]


def test_report_checks_of_the_bcg_prior_match_the_normal_closed_forms(
    bcg_checked: Path, tmp_path: Path, cli
) -> None:
    """The common-effect BCG prior is N(m, s²) with m, s from statsmodels' combine_effects;
    a study with standard error S predicts N(m, s² + S²); the posterior after y is normal with
    precision 1/s² + 1/S² (common practice); Box's (1980) two-sided tail probability is
    2 min(Phi(z), 1 - Phi(z)), z = (y - m) / sqrt(s² + S²)."""
    from statsmodels.stats.meta_analysis import combine_effects

    reference = combine_effects(Y, SE**2)
    m, s2, big_s, y = reference.mean_effect_fe, reference.sd_eff_w_fe**2, 0.2, -0.1
    out = tmp_path / "bcg.html"
    data = ("--se", str(big_s), "--estimate", str(y), "--db", bcg_checked)
    assert cli("report", "bcg", "--out", out, *data).code == 0
    text = out.read_text()
    predicted = stats.norm(m, (s2 + big_s**2) ** 0.5)
    precision = 1 / s2 + 1 / big_s**2
    posterior = stats.norm((m / s2 + y / big_s**2) / precision, precision**-0.5)
    tail = 2 * min(predicted.cdf(y), predicted.sf(y))
    for section, dist in (("prior-predictive", predicted), ("posterior", posterior)):
        rows, _, _ = _section(text, section)
        assert float(rows["mean"]) == pytest.approx(dist.mean(), rel=1e-5)
        assert float(rows["sd"]) == pytest.approx(dist.std(), rel=1e-5)
        assert float(rows["97.5% quantile"]) == pytest.approx(dist.ppf(0.975), rel=1e-5)
    rows, _, _ = _section(text, "conflict")
    assert float(rows["tail probability (p-value)"]) == pytest.approx(tail, rel=1e-5)


def test_report_with_a_planned_size_only_has_no_posterior(bcg_checked: Path, tmp_path, cli):
    out = tmp_path / "planned.html"
    assert cli("report", "bcg-control", "--out", out, "--n", "200", "--db", bcg_checked).code == 0
    text = out.read_text()
    assert 'id="prior-predictive"' in text and 'id="posterior"' not in text
    plain = tmp_path / "plain.html"
    assert cli("report", "bcg-control", "--out", plain, "--db", bcg_checked).code == 0
    assert 'id="prior-predictive"' not in plain.read_text()


@pytest.mark.parametrize(
    ("args", "message"),
    [
        (("bcg", "--events", "3", "--n", "10"), "not --events"),
        (("bcg", "--estimate", "-0.5"), "give the study's size as --se"),
        (("bcg", "--se", "0"), "must be greater than 0"),
        (("bcg-control", "--n", "10", "--estimate", "0.1"), "not --estimate"),
        (("bcg-control", "--n", "10", "--events", "11"), "cannot exceed n"),
        (("bcg-control", "--events", "3"), "give the study's size as --n"),
    ],
)
def test_report_with_a_bad_study_exits_2_with_one_line(
    bcg_checked: Path, tmp_path: Path, cli, args: tuple[str, ...], message: str
) -> None:
    out = tmp_path / "bad.html"
    result = cli("report", *args, "--out", out, "--db", bcg_checked)
    assert result.code == 2 and result.stdout == "" and not out.exists()
    assert len(result.stderr.strip().splitlines()) == 1 and message in result.stderr
