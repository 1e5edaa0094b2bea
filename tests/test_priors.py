"""Building, storing, verifying and tracing priors, on the BCG trials (Colditz et al. 1994,
JAMA 271:698; counts as typed in tests/test_frequentist.py)."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest
from statsmodels.stats.meta_analysis import combine_effects

from registry.priors.build import construct
from registry.priors.definition import parse_definition
from registry.priors.store import select_entries
from registry.storage.ledger import Ledger
from tests.conftest import write_sheet
from tests.test_frequentist import BCG_COUNTS, SE, Y, write_bcg_bibliography

BASE = """
name = "bcg"
parameter = "log risk ratio of tuberculosis, vaccinated versus not"
target = "mean"
[select]
quantity = "bcg-tb-risk"
[pool]
method = "common"
[discount]
mechanism = "none"
[output]
unit_sd = 2.0
ess_unit = "participants"
"""


@pytest.fixture
def bcg(cli, tmp_path: Path) -> Path:
    db = tmp_path / "bcg.db"
    bib = write_bcg_bibliography(tmp_path / "bcg.bib")
    assert cli("sources", "import", bib, "--db", db).code == 0
    rows = [
        [
            f"bcg{i:02d}",
            "bcg-tb-risk",
            "risk_ratio",
            a,
            a + b,
            c,
            c + d,
            "early" if i < 3 else "late",
            "Table 1 (Colditz et al. 1994)",
        ]
        for i, (a, b, c, d) in enumerate(BCG_COUNTS)
    ]
    sheet = write_sheet(
        tmp_path / "bcg.csv",
        [
            "source",
            "quantity",
            "measure",
            "events_a",
            "total_a",
            "events_b",
            "total_b",
            "tags",
            "location",
        ],
        *rows,
    )
    assert cli("import", sheet, "--create-sources", "--db", db).code == 0
    return db


def definition_file(tmp_path: Path, text: str = BASE, name: str = "bcg.toml") -> Path:
    path = tmp_path / name
    path.write_text(text)
    return path


def test_common_effect_mean_target_is_the_inverse_variance_normal(bcg: Path) -> None:
    definition = parse_definition(BASE)
    built = construct(definition, select_entries(Ledger.open(str(bcg)), definition))
    reference = combine_effects(Y, SE**2)  # statsmodels, outside reference
    (component,) = built.components
    assert component.family == "normal"
    assert component.params["loc"] == pytest.approx(reference.mean_effect_fe, abs=1e-6)
    assert component.params["scale"] == pytest.approx(reference.sd_eff_w_fe, abs=1e-6)
    # ESS of a normal prior with unit-information sd s_u and sd s is s_u²/s² (moment form).
    assert built.result.ess["variance_match"] == pytest.approx(
        4 / reference.sd_eff_w_fe**2, rel=1e-6
    )
    assert sum(r.share for r in built.rated) == pytest.approx(1.0)


def test_build_rebuild_verify_keep_the_digest(cli, bcg: Path, tmp_path: Path) -> None:
    path = definition_file(tmp_path)
    first = json.loads(cli("build", path, "--json", "--db", bcg).stdout)
    again = cli("build", path, "--json", "--db", bcg)
    assert json.loads(again.stdout)["digest"] == first["digest"]
    assert json.loads(again.stdout)["version"] == 1
    assert {"name", "version", "digest", "scale", "components", "ess", "entries"} <= set(first)
    assert {"id", "revision", "weight"} <= set(first["entries"][0])
    assert cli("verify", "bcg", "--db", bcg).code == 0
    listed = json.loads(cli("priors", "--json", "--db", bcg).stdout)["priors"]
    assert [(p["name"], p["version"], p["stale"]) for p in listed] == [("bcg", 1, False)]


def test_digest_is_identical_in_another_process(bcg: Path) -> None:
    definition = parse_definition(BASE)
    here = construct(definition, select_entries(Ledger.open(str(bcg)), definition)).digest
    code = (
        "from registry.priors.build import construct\n"
        "from registry.priors.definition import parse_definition\n"
        "from registry.priors.store import select_entries\n"
        "from registry.storage.ledger import Ledger\n"
        f"d = parse_definition({BASE!r})\n"
        f"print(construct(d, select_entries(Ledger.open({str(bcg)!r}), d)).digest)\n"
    )
    there = subprocess.run(
        [sys.executable, "-c", code],
        capture_output=True,
        text=True,
        check=True,
        env={"PYTHONHASHSEED": "123", "PATH": "/usr/bin"},
        cwd=Path(__file__).parent.parent,
    ).stdout.strip()
    assert there == here


CHANGES = [
    ("a choice", BASE.replace('method = "common"', 'method = "dl"')),
    ("a discount", BASE.replace('mechanism = "none"', 'mechanism = "power"')),
    (
        "a rating",
        BASE + '[[rule]]\nname = "early trials"\nwhere = { tags = ["early"] }\n'
        'design = { level = "minor", why = "older trials" }\n',
    ),
]


@pytest.mark.parametrize(("what", "text"), CHANGES, ids=[w for w, _ in CHANGES])
def test_digest_changes_with_any_input(
    cli, bcg: Path, tmp_path: Path, what: str, text: str
) -> None:
    first = json.loads(cli("build", definition_file(tmp_path), "--json", "--db", bcg).stdout)
    changed = cli("build", definition_file(tmp_path, text, "changed.toml"), "--json", "--db", bcg)
    doc = json.loads(changed.stdout)
    assert doc["digest"] != first["digest"] and doc["version"] == 2, what


def test_revision_and_retraction_make_verify_fail(cli, bcg: Path, tmp_path: Path) -> None:
    cli("build", definition_file(tmp_path), "--db", bcg)
    cli("revise", "1", "--set", "events_a=5", "--reason", "recount", "--db", bcg)
    failed = cli("verify", "bcg", "--db", bcg)
    assert failed.code == 1 and "entry 1 has revision 2" in failed.stderr
    listed = json.loads(cli("priors", "--json", "--db", bcg).stdout)["priors"]
    assert listed[0]["stale"] is True
    rebuilt = json.loads(cli("build", definition_file(tmp_path), "--json", "--db", bcg).stdout)
    assert rebuilt["version"] == 2 and cli("verify", "bcg", "--db", bcg).code == 0
    cli("sources", "retract", "bcg03", "--reason", "journal notice", "--db", bcg)
    retracted = cli("verify", "bcg", "--db", bcg)
    assert retracted.code == 1 and "retracted" in retracted.stderr


def test_trace_reaches_every_source(cli, bcg: Path, tmp_path: Path) -> None:
    cli("build", definition_file(tmp_path), "--db", bcg)
    doc = json.loads(cli("trace", "bcg", "--json", "--db", bcg).stdout)
    assert len(doc["entries"]) == len(BCG_COUNTS)
    for entry in doc["entries"]:
        assert entry["source"]["doi"] == "10.1001/jama.1994.03510330076038"
        assert (
            entry["source"]["citation"].startswith("BCG trial")
            and "(1994)" in entry["source"]["citation"]
        )
        assert {"events_a", "total_a", "events_b", "total_b"} == set(entry["reported"])
        assert entry["conversion"] == "log_risk_ratio_2x2" and len(entry["ratings"]) == 7
    text = cli("trace", "bcg", "--db", bcg)
    assert text.code == 0 and "Table 1 (Colditz et al. 1994)" in text.stdout


def test_ess_cap_is_met(bcg: Path) -> None:
    text = BASE.replace('mechanism = "none"', 'mechanism = "power"\ness_cap = 500')
    definition = parse_definition(text)
    built = construct(definition, select_entries(Ledger.open(str(bcg)), definition))
    assert built.result.ess["expected_information"] == pytest.approx(500, rel=0.01)
    assert built.result.global_power < 1


BAD_DEFINITIONS = [
    (BASE + "colour = 1\n", "output.colour"),
    (BASE.replace('method = "common"', 'method = "magic"'), "pool.method"),
    (BASE.replace('mechanism = "none"', "robust_weight = 1.5"), "discount.robust_weight"),
    (
        BASE.replace('parameter = "log risk ratio of tuberculosis, vaccinated versus not"\n', ""),
        "parameter",
    ),
    (BASE.replace('method = "common"', 'method = "dl"\nlikelihood = "exact"'), "pool.likelihood"),
    (
        BASE + '[[rule]]\nname = "x"\nwhere = { tags = ["early"] }\n'
        'design = { level = "awful", why = "?" }\n',
        "rule",
    ),
    (
        BASE + '[[rule]]\nname = "x"\nwhere = { tags = ["early"] }\ndesign = { level = "minor" }\n',
        "rule",
    ),
    (BASE + '[override.1]\nsetting = { level = "serious" }\n', "override"),
    ('name = "bcg"\nparameter = [', None),
]


@pytest.mark.parametrize(("text", "key"), BAD_DEFINITIONS)
def test_bad_definition_exits_2_naming_the_key(
    cli, bcg: Path, tmp_path: Path, text: str, key: str | None
) -> None:
    path = definition_file(tmp_path, text)
    result = cli("build", path, "--db", bcg)
    assert result.code == 2 and result.stdout == ""
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in result.stderr
    assert "bcg.toml" in lines[0]
    if key is not None:
        assert f"'{key}" in lines[0]
    if key == "pool.method":
        assert "line 8" in lines[0]  # BASE opens with an empty line


def test_a_study_reported_twice_must_be_resolved(cli, bcg: Path, tmp_path: Path) -> None:
    sheet = write_sheet(
        tmp_path / "more.csv",
        ["source", "study", "quantity", "measure", "estimate", "lower", "upper"],
        ["bcg00b", "bcg00", "bcg-tb-risk", "risk_ratio", "0.4", "0.12", "1.2"],
    )
    cli("import", sheet, "--create-sources", "--db", bcg)
    refused = cli("build", definition_file(tmp_path), "--db", bcg)
    assert refused.code == 2 and "select.studies" in refused.stderr
    resolved = BASE.replace(
        'quantity = "bcg-tb-risk"', 'quantity = "bcg-tb-risk"\n[select.studies]\n"bcg00" = 1'
    )
    assert cli("build", definition_file(tmp_path, resolved), "--db", bcg).code == 0


IDLE_RULE = """
[[rule]]
name = "early trials"
where = { tags = ["early"] }
population = { level = "minor", why = "older vaccine lots" }

[[rule]]
name = "typo"
where = { tags = ["ealry"] }
population = { level = "serious", why = "a tag that no entry has" }
"""


def test_a_rule_matching_no_entry_is_reported(cli, bcg: Path, tmp_path: Path) -> None:
    path = definition_file(tmp_path, BASE + IDLE_RULE)
    built = cli("build", path, "--json", "--db", bcg)
    assert built.code == 0
    assert "warning: rule 'typo' matches no selected entry" in built.stderr
    assert "early trials" not in built.stderr
    assert "rule 'typo' matches no selected entry" in json.loads(built.stdout)["notes"]
    strict = cli("build", path, "--strict", "--db", bcg)
    assert strict.code == 2 and "rule 'typo'" in strict.stderr
