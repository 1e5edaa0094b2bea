"""Expert judgement: quantile fits per expert and the linear opinion pool, checked against
scipy's distributions and a dense-grid mixture written here. Judgements are invented."""

from __future__ import annotations

import csv
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from registry.evidence.elicit import LinearPool, fit_judgements, read_elicitation
from registry.storage.ledger import Ledger

HEADER = ["source", "expert", "quantity", "measure", "level", "value", "notes"]
LEVELS = (0.05, 0.5, 0.95)


def judgement_sheet(path: Path, rows: list[list[object]]) -> Path:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(HEADER)
        writer.writerows(rows)
    return path


def expert_rows(expert: str, dist: object, measure: str = "mean", quantity: str = "q") -> list:
    return [
        ["panel", expert, quantity, measure, p, repr(float(dist.ppf(p))), "invented"]  # type: ignore[attr-defined]
        for p in LEVELS
    ]


def test_three_quantiles_of_a_normal_give_back_its_mean_and_sd() -> None:
    """5 %, 50 % and 95 % quantiles of N(2.3, 0.7²) (scipy) lie exactly on the normal's
    quantile line, so the least-squares fit returns 2.3 and 0.7 with zero error."""
    truth = stats.norm(2.3, 0.7)
    params, mean, sd, rms, worst = fit_judgements(LEVELS, [truth.ppf(p) for p in LEVELS])
    assert (mean, sd) == pytest.approx((2.3, 0.7), rel=1e-12)
    assert params == pytest.approx({"loc": 2.3, "scale": 0.7}, rel=1e-12)
    assert rms < 1e-12 and worst < 1e-12


def test_a_skewed_quantity_fitted_as_lognormal_recovers_its_parameters() -> None:
    """Five quantiles of a log-normal with log-mean 1.2 and log-sd 0.5 (scipy's lognorm)."""
    truth = stats.lognorm(s=0.5, scale=math.exp(1.2))
    levels = (0.05, 0.25, 0.5, 0.75, 0.95)
    params, mean, sd, rms, _ = fit_judgements(levels, [truth.ppf(p) for p in levels], "lognormal")
    assert params["s"] == pytest.approx(0.5, rel=1e-9)
    assert math.log(params["scale"]) == pytest.approx(1.2, rel=1e-9)
    assert (mean, sd) == pytest.approx((truth.mean(), truth.std()), rel=1e-9)
    assert rms < 1e-9
    # a normal cannot follow the skew: its fit error says so
    assert fit_judgements(levels, [truth.ppf(p) for p in levels])[3] > 0.05


def test_the_linear_pool_against_a_dense_grid_mixture(tmp_path: Path) -> None:
    experts = {"a": stats.norm(-0.4, 0.2), "b": stats.norm(0.1, 0.35), "c": stats.norm(-0.1, 0.1)}
    rows = [r for name, dist in experts.items() for r in expert_rows(name, dist, "mean_difference")]
    elicitation = read_elicitation(judgement_sheet(tmp_path / "j.csv", rows), pool="linear")
    (pool,) = elicitation.pools
    assert isinstance(pool, LinearPool)
    # the mixture (1/3) Σ f_j on a dense grid, integrated by the trapezoid rule
    grid = np.linspace(-3.0, 3.0, 600_001)
    density = sum(d.pdf(grid) for d in experts.values()) / 3
    cdf = np.concatenate([[0.0], np.cumsum((density[1:] + density[:-1]) / 2 * np.diff(grid))])
    for p in (0.05, 0.25, 0.5, 0.75, 0.95):
        assert pool.quantile(p) == pytest.approx(np.interp(p, cdf, grid), abs=1e-5)
    mean = np.trapezoid(grid * density, grid)
    sd = math.sqrt(np.trapezoid((grid - mean) ** 2 * density, grid))
    assert (pool.mean, pool.sd) == pytest.approx((mean, sd), rel=1e-6)


def test_elicit_stores_expert_entries_and_the_pool(cli, db_path: Path, tmp_path: Path) -> None:
    """A proportion judged by two experts: each entry's y and se are the normal fitted on
    the logit scale (the judgements are exact quantiles of logit-normals, so the fit is exact)."""
    truths = {"ann": stats.norm(-1.5, 0.4), "bo": stats.norm(-1.0, 0.3)}
    rows = [
        ["panel", name, "p", "proportion", f"{p:.0%}", repr(1 / (1 + math.exp(-d.ppf(p)))), ""]
        for name, d in truths.items()
        for p in LEVELS
    ]
    sheet = judgement_sheet(tmp_path / "panel.csv", rows)
    figure = tmp_path / "panel.png"
    args = ("elicit", sheet, "--pool", "linear", "--plot", figure, "--create-sources", "--json")
    result = cli(*args, "--db", db_path)
    assert result.code == 0, result.stderr
    doc = json.loads(result.stdout)
    assert [e["y"] for e in doc["experts"]] == pytest.approx([-1.5, -1.0], rel=1e-9)
    assert [e["se"] for e in doc["experts"]] == pytest.approx([0.4, 0.3], rel=1e-9)
    assert figure.stat().st_size > 0
    entries = Ledger.open(str(db_path)).entries()
    assert [(e.context["design"], e.conversion) for e in entries] == [
        ("expert", "elicited_normal_quantile_lsq"),
        ("expert", "elicited_normal_quantile_lsq"),
        ("expert", "linear_pool_moments"),
    ]
    assert entries[0].reported == {
        f"quantile_{p!r}": r[5] for p, r in zip(LEVELS, rows[:3], strict=True)
    }
    pool_mean = (-1.5 - 1.0) / 2
    pool_sd = math.sqrt((0.4**2 + 1.5**2 + 0.3**2 + 1.0**2) / 2 - pool_mean**2)
    assert (entries[2].y, entries[2].se) == pytest.approx((pool_mean, pool_sd), rel=1e-9)
    again = cli(*args, "--db", db_path)
    assert json.loads(again.stdout)["import"]["added"] == []


def test_non_increasing_judgements_exit_2_naming_the_row(
    cli, db_path: Path, tmp_path: Path
) -> None:
    rows = [
        ["panel", "ann", "q", "mean", 0.05, 1.0, ""],
        ["panel", "ann", "q", "mean", 0.95, 2.0, ""],
        ["panel", "ann", "q", "mean", 0.5, 2.5, ""],
    ]
    result = cli("elicit", judgement_sheet(tmp_path / "j.csv", rows), "--db", db_path)
    assert result.code == 2
    assert "row 3, column 'value'" in result.stderr and "Traceback" not in result.stderr


DEFINITION = """
name = "panel"
parameter = "an invented mean difference"
target = "mean"
[select]
quantity = "q"
exclude_tags = ["expert-pool"]
[pool]
method = "common"
[discount]
mechanism = "power"
[output]
unit_sd = 1.0
ess_unit = "participants"
"""
EXPERT_RULE = """
[[rule]]
name = "elicited"
where = { design = "expert" }
population = { level = "serious", why = "experts judged another population" }
"""


def test_expert_entries_are_rated_and_discounted(tmp_path: Path) -> None:
    from registry.priors.build import construct
    from registry.priors.definition import parse_definition
    from registry.priors.store import select_entries

    experts = {"a": stats.norm(-0.4, 0.2), "b": stats.norm(0.1, 0.35)}
    rows = [r for name, dist in experts.items() for r in expert_rows(name, dist, "mean_difference")]
    ledger = Ledger.open(str(tmp_path / "r.db"))
    ledger.import_elicitation(
        judgement_sheet(tmp_path / "j.csv", rows), pool="linear", create_sources=True
    )
    plain = parse_definition(DEFINITION)
    rated = parse_definition(DEFINITION + EXPERT_RULE)
    entries = select_entries(ledger, rated)
    assert [e.extra["x_expert"] for e in entries] == ["a", "b"]  # the pool is left out
    built = construct(rated, entries)
    for r in built.rated:
        population = next(x for x in r.ratings if x.domain == "population")
        assert (population.level, population.rule) == ("serious", "rule: elicited")
        assert r.discount.power < 1
    (undiscounted,) = construct(plain, entries).components
    (discounted,) = built.components
    assert discounted.params["scale"] > undiscounted.params["scale"]
    assert not any("elicited" in w for w in built.result.warnings)


def test_gamma_judgements_recover_its_parameters() -> None:
    """Four quantiles of scipy's gamma(a=3, scale=0.5)."""
    truth = stats.gamma(a=3.0, scale=0.5)
    levels = (0.1, 0.4, 0.6, 0.9)
    params, mean, sd, rms, _ = fit_judgements(levels, [truth.ppf(p) for p in levels], "gamma")
    assert params == pytest.approx({"a": 3.0, "scale": 0.5}, rel=1e-7)
    assert (mean, sd) == pytest.approx((truth.mean(), truth.std()), rel=1e-7)
    assert rms < 1e-9
