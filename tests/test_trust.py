"""Defaults a reviewer can trust: each check is against an outside reference.

Data, each recalled from memory and so marked:
- eight schools (Rubin 1981, J Educ Stat 6:377): coaching effects y and their standard
  errors, on the identity scale (points on a test);
- pump failures (Gaver & O'Muircheartaigh 1987, Technometrics 29:1): failures of ten pumps
  and operating times in thousands of hours;
- the BCG trials' unvaccinated arms (Colditz et al. 1994, JAMA 271:698), as in
  test_frequentist.py: tuberculosis cases out of the arm's size, a placebo-like control arm.
References: dense grids and scipy.integrate written here; scipy.stats; statsmodels.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pytest
from scipy import integrate, special, stats
from statsmodels.stats.meta_analysis import combine_effects

from registry.errors import InputError
from registry.priors.build import construct
from registry.priors.definition import parse_definition
from registry.priors.selection import pool_entries
from registry.synthesis.mixture import QUANTILE_ERROR_BOUND
from registry.values.built import BuildResult
from tests.conftest import write_sheet
from tests.test_frequentist import BCG_COUNTS

SCHOOLS_Y = [28.0, 8.0, -3.0, 7.0, -1.0, 1.0, 18.0, 12.0]
SCHOOLS_SE = [15.0, 10.0, 16.0, 11.0, 9.0, 11.0, 10.0, 18.0]
PUMP_FAILURES = [5, 1, 5, 14, 3, 19, 1, 1, 4, 22]
PUMP_KHOURS = [94.320, 15.720, 62.880, 125.760, 5.240, 31.440, 1.048, 1.048, 2.096, 10.480]


def entry(i: int, measure: str, scale: str, y: float, se: float, **reported: str) -> object:
    return SimpleNamespace(
        id=i + 1,
        revision=1,
        source=f"s{i}",
        study=f"s{i}",
        measure=measure,
        scale=scale,
        y=y,
        se=se,
        reported=reported,
        context={},
        tags=(),
        retracted=False,
    )


def schools() -> list[object]:
    return [
        entry(i, "mean_difference", "identity", y, s)
        for i, (y, s) in enumerate(zip(SCHOOLS_Y, SCHOOLS_SE, strict=True))
    ]


def pumps(factor: float = 1.0) -> list[object]:
    out = []
    for i, (x, t) in enumerate(zip(PUMP_FAILURES, PUMP_KHOURS, strict=True)):
        exposure = t * factor
        out.append(
            entry(i, "rate", "log", math.log(x / exposure), 1 / math.sqrt(x),
                  events=str(x), exposure=repr(exposure))
        )  # fmt: skip
    return out


# --- the tau prior on an identity scale ------------------------------------------------------


def test_identity_scale_needs_a_tau_prior() -> None:
    with pytest.raises(InputError) as refused:
        pool_entries(schools(), method="bayes")
    assert refused.value.field == "tau_prior" and "outcome's own units" in str(refused.value)


def test_eight_schools_against_a_dense_grid() -> None:
    """A dense trapezoid grid on tau (flat mu prior, half-normal(10) on tau), with mu integrated
    in closed form: p(tau | y) ∝ p(tau) W^(-1/2) prod (se_i² + tau²)^(-1/2)
    exp(-1/2 sum w_i (y_i - m)²), w_i = 1/(se_i² + tau²), W = sum w_i, m = sum w_i y_i / W;
    a new school's effect given tau is N(m, 1/W + tau²) (Gelman et al., Bayesian Data
    Analysis, ch. 5, recalled). The grid is written here, independently of the package."""
    result = pool_entries(schools(), method="bayes", tau_prior="half-normal:10")
    y, s = np.array(SCHOOLS_Y), np.array(SCHOOLS_SE)
    tau = np.linspace(0.0, 120.0, 60001)
    w = 1.0 / (s[None, :] ** 2 + tau[:, None] ** 2)
    big_w = w.sum(axis=1)
    m = (w * y).sum(axis=1) / big_w
    log_post = (
        stats.halfnorm.logpdf(tau, scale=10)
        + 0.5 * np.log(w).sum(axis=1)
        - 0.5 * np.log(big_w)
        - 0.5 * (w * (y - m[:, None]) ** 2).sum(axis=1)
    )
    dens = np.exp(log_post - log_post.max())
    cdf = integrate.cumulative_trapezoid(dens, tau, initial=0.0)
    weight = dens * (tau[1] - tau[0])  # trapezoid weights: half at both ends
    weight[[0, -1]] /= 2
    weight /= weight.sum()
    assert result.tau == pytest.approx(np.interp(0.5, cdf / cdf[-1], tau), rel=1e-4)
    sd_new = np.sqrt(1.0 / big_w + tau**2)

    def predictive_cdf(x: float) -> float:
        return float(weight @ stats.norm.cdf(x, m, sd_new))

    from scipy.optimize import brentq

    for q in (0.025, 0.5, 0.975):
        truth = brentq(lambda x, q=q: predictive_cdf(x) - q, -200, 200, xtol=1e-10)
        assert result.predictive.quantiles[str(q)] == pytest.approx(truth, abs=result.accuracy)
    assert result.mu == pytest.approx(float(weight @ m), abs=1e-4)


def test_a_tau_prior_in_units_of_the_unit_sd() -> None:
    given = pool_entries(schools(), method="bayes", tau_prior="half-normal:10")
    scaled = pool_entries(
        schools(), method="bayes", tau_prior="half-normal:0.5*unit_sd", unit_sd=20.0
    )
    assert scaled.tau == given.tau and scaled.tau_prior == "half-normal:10"
    with pytest.raises(InputError):
        pool_entries(schools(), method="bayes", tau_prior="half-normal:0.5*unit_sd")


def test_log_scale_default_is_stated() -> None:
    result = pool_entries(pumps(), method="bayes", likelihood="exact")
    assert result.tau_prior == "half-normal:0.5"


# --- the robust component of a rate prior ----------------------------------------------------

RATE = """
name = "pumps"
parameter = "failure rate of a new pump"
[select]
quantity = "pump-failures"
[pool]
method = "bayes"
likelihood = "exact"
[discount]
mechanism = "none"
robust_weight = 0.2
[output]
family = "gamma"
"""


@pytest.mark.parametrize("factor", [1e3, 1e-3])
def test_robust_rate_prior_does_not_depend_on_the_unit_of_exposure(factor: float) -> None:
    """Exposure in hours instead of thousands of hours: the same prior in the new unit (every
    gamma shape and weight unchanged, every scale divided by 1,000) and an effective sample
    size 1,000 times larger in exposure (the same number of expected events)."""
    definition = parse_definition(RATE)
    base = construct(definition, pumps()).result
    other = construct(definition, pumps(factor)).result
    assert len(base.components) == len(other.components) and base.warnings == other.warnings
    for a, b in zip(base.components, other.components, strict=True):
        assert b.weight == pytest.approx(a.weight, rel=1e-4)
        assert b.params["a"] == pytest.approx(a.params["a"], rel=1e-4)
        assert b.params["scale"] == pytest.approx(a.params["scale"] / factor, rel=1e-4)
    for method in ("variance_match", "curvature_at_mean", "expected_information"):
        if base.ess[method] is None:  # the pumps' wide predictive: see test_ess
            assert other.ess[method] is None and other.ess["notes"][method]
        else:
            assert other.ess[method] == pytest.approx(base.ess[method] * factor, rel=1e-3)
    vague = base.components[-1]
    assert vague.params["a"] == 1.0  # one expected event
    assert "one" in base.robust["description"] and "expected event" in base.robust["description"]
    assert any("vague component" in note for note in base.notes)


# --- a mixture keeps the exact predictive's ESS and tails ------------------------------------

BCG_CONTROL = """
name = "bcg-control"
parameter = "risk of tuberculosis in an unvaccinated arm"
[select]
quantity = "bcg-control-risk"
[pool]
method = "bayes"
likelihood = "exact"
tau_prior = "half-normal:1"
mu_prior = "normal:0,10"
[discount]
mechanism = "none"
[output]
family = "beta"
"""


def bcg_control_arms(rows: tuple[int, ...] | None = None) -> list[object]:
    return [
        entry(i, "proportion", "logit", math.log((c + 0.5) / (d + 0.5)), 0.1,
              events=str(c), total=str(c + d))
        for i, (_, _, c, d) in enumerate(BCG_COUNTS)
        if rows is None or i in rows
    ]  # fmt: skip


def test_beta_mixture_keeps_the_exact_predictive_tails_and_ess() -> None:
    """Five of the trials (the 4th, 8th, 11th, 12th and 13th of the table), whose predictive
    four beta components approximate within every bound."""
    entries = bcg_control_arms((3, 7, 10, 11, 12))
    built = construct(parse_definition(BCG_CONTROL), entries).result
    assert built.fit["meets_bounds"] is True and not built.warnings
    exact = pool_entries(
        entries, method="bayes", likelihood="exact", tau_prior="half-normal:1",
        mu_prior="normal:0,10",
    ).predictive  # fmt: skip
    mixture = built.components

    def mixture_cdf(p: float) -> float:
        return sum(c.weight * stats.beta.cdf(p, c.params["a"], c.params["b"]) for c in mixture)

    for q in (0.005, 0.995):
        truth = float(exact.ppf([q])[0])
        lo, hi = special.expit(truth - 1), special.expit(truth + 1)
        from scipy.optimize import brentq

        got = special.logit(brentq(lambda p, q=q: mixture_cdf(p) - q, lo, hi, xtol=1e-14))
        assert abs(got - truth) <= QUANTILE_ERROR_BOUND * exact.sd
    # variance matching to a beta (a + b = m(1-m)/v - 1) of the exact predictive, by quad
    lo, hi = (float(v) for v in exact.ppf([1e-9, 1 - 1e-9]))
    moments = [
        integrate.quad(lambda x, k=k: special.expit(x) ** k * float(exact.pdf([x])[0]), lo, hi,
                       limit=400)[0]
        for k in (0, 1, 2)
    ]  # fmt: skip
    m = moments[1] / moments[0]
    v = moments[2] / moments[0] - m * m
    assert built.ess["variance_match"] == pytest.approx(m * (1 - m) / v - 1, rel=0.05)


def test_a_mixture_that_misses_its_bounds_says_by_how_much() -> None:
    """All thirteen arms: risks from 0.4% to 24% give a predictive that four beta components
    cannot follow within the bounds; the build keeps the best fit and says so."""
    built = construct(parse_definition(BCG_CONTROL), bcg_control_arms()).result
    assert built.fit["meets_bounds"] is False
    assert built.fit["quantile_relative"] > QUANTILE_ERROR_BOUND
    (warning,) = built.warnings
    assert f"{built.fit['quantile_relative']:.3g}" in warning and "max_components" in warning
    assert warning in built.notes


# --- the frequentist predictive target -------------------------------------------------------

FREQUENTIST = """
name = "f"
parameter = "log risk ratio"
[select]
quantity = "q"
[pool]
method = "reml"
[discount]
mechanism = "none"
[output]
unit_sd = 2.0
family = "{family}"
"""


def bcg_log_rr(k: int) -> list[object]:
    out = []
    for i, (a, b, c, d) in enumerate(BCG_COUNTS[:k]):
        y = math.log((a / (a + b)) / (c / (c + d)))
        se = math.sqrt(1 / a - 1 / (a + b) + 1 / c - 1 / (c + d))
        out.append(entry(i, "risk_ratio", "log", y, se))
    return out


@pytest.mark.parametrize("k", [3, 4])
def test_a_predictive_t_with_under_3_df_is_refused(k: int) -> None:
    with pytest.raises(InputError) as refused:
        construct(parse_definition(FREQUENTIST.format(family="auto")), bcg_log_rr(k))
    assert refused.value.field == "target" and "bayes" in str(refused.value)


def test_normal_family_uses_exact_moments() -> None:
    """A normal fitted to the Higgins et al. (2009) Student-t has its exact variance
    scale² df / (df - 2) (handbook moment); to a mean target, statsmodels' estimate."""
    entries = bcg_log_rr(13)
    built = construct(parse_definition(FREQUENTIST.format(family="normal")), entries).result
    (normal,) = built.components
    pooled = built.pooled
    df = 11
    t_scale = math.sqrt(pooled["tau2"] + pooled["se"] ** 2)
    assert normal.params["scale"] == pytest.approx(t_scale * math.sqrt(df / (df - 2)), rel=1e-12)
    mean_target = (
        FREQUENTIST.format(family="normal")
        .replace("[select]", 'target = "mean"\n[select]')
        .replace('"reml"', '"pm"')  # Paule-Mandel: statsmodels' "iterated"
    )
    (normal,) = construct(parse_definition(mean_target), entries).result.components
    reference = combine_effects(
        np.array([e.y for e in entries]), np.array([e.se for e in entries]) ** 2,
        method_re="iterated",
    )  # fmt: skip
    assert normal.params["loc"] == pytest.approx(reference.mean_effect_re, abs=1e-4)


# --- retracted sources -----------------------------------------------------------------------

SHEET = ["source", "quantity", "measure", "events_a", "total_a", "events_b", "total_b"]
BCG_DEF = """
name = "bcg"
parameter = "log risk ratio of tuberculosis, vaccinated versus not"
target = "mean"
[select]
quantity = "bcg"
[pool]
method = "common"
[discount]
mechanism = "none"
[output]
unit_sd = 2.0
"""


@pytest.fixture
def registry(cli, tmp_path: Path) -> Path:
    db = tmp_path / "r.db"
    rows = [[f"bcg{i:02d}", "bcg", "risk_ratio", a, a + b, c, c + d]
            for i, (a, b, c, d) in enumerate(BCG_COUNTS)]  # fmt: skip
    sheet = write_sheet(tmp_path / "s.csv", SHEET, *rows)
    assert cli("import", sheet, "--create-sources", "--db", db).code == 0
    assert cli("sources", "retract", "bcg03", "--reason", "journal notice", "--db", db).code == 0
    return db


def test_retracted_source_is_left_out_of_build_and_pool(cli, registry: Path, tmp_path: Path):
    definition = tmp_path / "bcg.toml"
    definition.write_text(BCG_DEF)
    built = json.loads(cli("build", definition, "--json", "--db", registry).stdout)
    assert 4 not in [e["id"] for e in built["entries"]] and len(built["entries"]) == 12
    assert built["include_retracted"] is False and built["stale"] is False
    pooled = cli("pool", "--quantity", "bcg", "--method", "common", "--json", "--db", registry)
    assert json.loads(pooled.stdout)["k"] == 12 and "retracted" in pooled.stderr
    both = cli("pool", "--quantity", "bcg", "--include-retracted", "--json", "--db", registry)
    assert json.loads(both.stdout)["k"] == 13 and "retracted" in both.stderr


def test_opting_in_is_recorded_and_shown(cli, registry: Path, tmp_path: Path) -> None:
    definition = tmp_path / "bcg.toml"
    definition.write_text(BCG_DEF.replace('quantity = "bcg"', 'quantity = "bcg"\n'
                                          "include_retracted = true"))  # fmt: skip
    built = json.loads(cli("build", definition, "--json", "--db", registry).stdout)
    assert len(built["entries"]) == 13 and built["include_retracted"] is True
    assert built["stale"] is True and any("retracted" in r for r in built["stale_reasons"])
    shown = cli("prior", "bcg", "--db", registry)
    assert "retracted sources are included" in shown.stdout
    emitted = cli("emit", "bcg", "--to", "stan", "--db", registry)
    assert emitted.code == 0 and "stale" in emitted.stderr
    assert "// STALE: source bcg03 of entry 4 is retracted" in emitted.stdout


def test_a_format_1_result_still_loads() -> None:
    """What version 0.1.0 stored: ESS keys named after the methods' authors."""
    old = {
        "scale": "log",
        "measure": "risk_ratio",
        "components": [{"weight": 1.0, "family": "normal", "loc": -0.5, "scale": 0.2}],
        "ess": {"value": 100.0, "method": "elir", "elir": 100.0, "moment": 100.0,
                "morita": 100.0, "unit": "events", "notes": {"morita": "x"}},
        "pooled": {"k": 3}, "fit": {"method": "closed form"}, "global_power": 1.0,
        "target": "mean", "notes": [], "plausible": None,
    }  # fmt: skip
    result = BuildResult.from_dict(old)
    assert result.ess["method"] == "expected_information"
    assert result.ess["variance_match"] == 100.0 and result.ess["notes"]["curvature_at_mean"]
    assert BuildResult.from_dict(result.to_dict()) == result
