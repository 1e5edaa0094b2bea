"""`priorledger pool` end to end on a published dataset: the BCG vaccine trials.

The counts (Colditz et al. 1994, JAMA 271:698, as typed in tests/test_frequentist.py) go in
as an extraction sheet of 2x2 tables; the command's JSON is checked against statsmodels'
`combine_effects` (an outside reference library) and the published REML values.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from statsmodels.stats.meta_analysis import combine_effects

from registry.priors.selection import pool_entries
from registry.storage.ledger import Ledger
from tests.conftest import write_sheet
from tests.test_frequentist import BCG_COUNTS, RECALLED_BCG, SE, SM_PM_OPTIONS, Y


@pytest.fixture
def bcg_db(cli, tmp_path: Path) -> Path:
    db = tmp_path / "bcg.db"
    rows = [
        [f"bcg{i:02d}", "bcg-tb-risk", "risk_ratio", a, a + b, c, c + d]
        for i, (a, b, c, d) in enumerate(BCG_COUNTS)
    ]
    sheet = write_sheet(
        tmp_path / "bcg.csv",
        ["source", "quantity", "measure", "events_a", "total_a", "events_b", "total_b"],
        *rows,
    )
    assert cli("import", sheet, "--create-sources", "--db", db).code == 0
    return db


def pooled(cli, db: Path, *args: str) -> dict:
    result = cli("pool", "--quantity", "bcg-tb-risk", "--json", "--db", db, *args)
    assert result.code == 0, result.stderr
    return json.loads(result.stdout)


@pytest.mark.parametrize(
    ("method", "sm_method", "options"), [("dl", "dl", {}), ("pm", "pm", SM_PM_OPTIONS)]
)
def test_dl_and_pm_match_statsmodels(cli, bcg_db: Path, method, sm_method, options) -> None:
    doc = pooled(cli, bcg_db, "--method", method)
    reference = combine_effects(Y, SE**2, method_re=sm_method, **options)
    assert doc["k"] == 13 and doc["method"] == method
    assert doc["mu"] == pytest.approx(reference.mean_effect_re, abs=1e-6)
    assert doc["se"] == pytest.approx(reference.sd_eff_w_re, abs=1e-6)
    assert doc["tau2"] == pytest.approx(reference.tau2, abs=1e-6)
    assert doc["q"] == pytest.approx(reference.q, abs=1e-6)
    assert {"ci", "i2", "prediction"} <= set(doc)


def test_reml_matches_published_values(cli, bcg_db: Path) -> None:
    doc = pooled(cli, bcg_db, "--method", "reml")
    recalled = RECALLED_BCG["reml"]  # published values, recalled from memory (see there)
    assert doc["tau2"] == pytest.approx(recalled["tau2"], abs=6e-4)
    assert doc["mu"] == pytest.approx(recalled["mu"], abs=6e-4)


def test_bayes_json_and_library_agree(cli, bcg_db: Path) -> None:
    doc = pooled(cli, bcg_db, "--method", "bayes", "--tau-prior", "half-normal:1")
    assert set(doc["predictive"]["quantiles"]) >= {"0.025", "0.5", "0.975"}
    library = pool_entries(
        Ledger.open(str(bcg_db)).entries(), method="bayes", tau_prior="half-normal:1"
    )
    assert doc["predictive"]["quantiles"] == library.to_dict()["predictive"]["quantiles"]
    # The predictive is wider than the credible interval of mu (it adds tau).
    q = doc["predictive"]["quantiles"]
    assert q["0.975"] - q["0.025"] > doc["ci"][1] - doc["ci"][0]
    assert np.isfinite(doc["predictive"]["sd"])


def test_forest_plot_is_written(cli, bcg_db: Path, tmp_path: Path) -> None:
    figure = tmp_path / "forest.png"
    pooled(cli, bcg_db, "--method", "reml", "--plot", str(figure))
    assert figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and figure.stat().st_size > 10_000


@pytest.mark.parametrize(
    ("args", "field"),
    [
        (["--method", "magic"], "method"),
        (["--method", "reml", "--likelihood", "exact"], "likelihood"),
        (["--method", "bayes", "--tau-prior", "uniform:1"], "tau_prior"),
        (["--method", "bayes", "--likelihood", "exact"], "likelihood"),
    ],
)
def test_bad_pool_options_exit_2(cli, bcg_db: Path, args: list[str], field: str) -> None:
    result = cli("pool", "--quantity", "bcg-tb-risk", "--db", bcg_db, *args)
    assert result.code == 2 and f"'{field}'" in result.stderr
    assert len(result.stderr.strip().splitlines()) == 1
