"""The evidence layer: reported numbers -> (y, se) on the analysis scale.

Every expected number comes from outside the project: a published worked example (source
beside it; "recalled" where the number is recalled from memory rather than read), a
handbook formula evaluated with scipy's normal quantiles, or a general-purpose library
(scipy, statsmodels) fitting the same model. Hypothesis runs are derandomized (seeded).
"""

from __future__ import annotations

import ast
import math
import warnings
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import NamedTuple

import numpy as np
import pytest
import statsmodels.api as sm
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import special, stats
from scipy.differentiate import derivative
from statsmodels.stats.contingency_tables import Table2x2
from statsmodels.tools.sm_exceptions import PerfectSeparationWarning

from registry.errors import ConversionError
from registry.evidence import convert
from registry.evidence.convert import (
    ANALYSIS_SCALE,
    MEASURES,
    NUMERIC_FIELDS,
    derive,
    log_odds_ratio_to_smd,
    smd_to_log_odds_ratio,
)
from registry.values import scales
from registry.values.measures import MEASURES as MEASURE_TABLE
from registry.values.scales import to_analysis, to_natural

SEEDED = settings(derandomize=True, deadline=None, max_examples=150)

# SPEC.md, "Extraction sheets": proportion -> logit; rate and all ratios -> log;
# correlation -> Fisher z; the rest identity.
SPEC_SCALES = {
    "proportion": "logit",
    "rate": "log",
    "odds_ratio": "log",
    "risk_ratio": "log",
    "rate_ratio": "log",
    "hazard_ratio": "log",
    "correlation": "fisher_z",
    "mean": "identity",
    "mean_difference": "identity",
    "smd": "identity",
    "risk_difference": "identity",
    "coefficient": "identity",
}


def z_two_sided(level: float) -> float:
    """Reference normal quantile from scipy (outside the code under test)."""
    return float(stats.norm.ppf((1.0 + level) / 2.0))


# ---------------------------------------------------------------------------------------
# 1. Published worked examples and handbook formulas


class Published(NamedTuple):
    label: str
    measure: str
    reported: dict[str, float]
    y: float
    se: float
    tol: float  # absolute, matching the rounding of the published figures
    conversion: str
    source: str


BORENSTEIN_CH4 = dict(mean_a=103.0, sd_a=5.5, n_a=50, mean_b=100.0, sd_b=4.5, n_b=50)
BORENSTEIN_CH5 = dict(events_a=5, total_a=100, events_b=10, total_b=100)
CHINN = math.sqrt(3) / math.pi
GROUPS = {"mean_a": 1.0, "sd_a": 1.0, "n_a": 9, "mean_b": 0.0, "sd_b": 1.0, "n_b": 9}  # invented

PUBLISHED = [
    Published(
        "hedges g", "smd", BORENSTEIN_CH4, 0.5924, math.sqrt(0.0411), 5e-4, "hedges_g",
        "Borenstein et al. 2009 ch. 4 worked example: d = 0.5970, V_d = 0.0418, J = 0.9923, "
        "g = 0.5924, V_g = 0.0411 (recalled from memory)",
    ),
    Published(
        "raw mean difference", "mean_difference", BORENSTEIN_CH4, 3.0, math.sqrt(1.01), 1e-4,
        "mean_difference_groups",
        "Borenstein et al. 2009 ch. 4: D = 3.00, V_D = 1.0100 (recalled; equal n, so the "
        "pooled and unpooled variances agree)",
    ),
    Published(
        "log OR from d", "odds_ratio", BORENSTEIN_CH4, 0.5970 / CHINN,
        math.sqrt(0.0418) / CHINN, 1e-3, "chinn_log_odds_ratio_from_smd",
        "Borenstein ch. 4 d = 0.5970, V_d = 0.0418 (recalled) through Chinn 2000 "
        "ln OR = d pi/sqrt(3), V = V_d pi^2/3",
    ),
    Published(
        "log risk ratio", "risk_ratio", BORENSTEIN_CH5, -0.6931, 0.5292, 1e-4,
        "log_risk_ratio_2x2",
        "Borenstein et al. 2009 ch. 5: 5/100 vs 10/100, ln RR = -0.6931, V = 0.2800, "
        "SE = 0.5292 (recalled from memory)",
    ),
    Published(
        "log odds ratio", "odds_ratio", BORENSTEIN_CH5, -0.7472, 0.5671, 1e-4,
        "log_odds_ratio_2x2",
        "Borenstein et al. 2009 ch. 5: ln OR = -0.7472, V = 0.3216, SE = 0.5671 (recalled)",
    ),
    Published(
        "risk difference", "risk_difference", BORENSTEIN_CH5, -0.0500, 0.0371, 1e-4,
        "risk_difference_2x2",
        "Borenstein et al. 2009 ch. 5: RD = -0.0500, V = 0.0014, SE = 0.0371 (recalled)",
    ),
    Published(
        "smd from 2x2", "smd", BORENSTEIN_CH5, -0.7472 * 0.5513, 0.5671 * 0.5513, 2e-4,
        "chinn_smd_from_log_odds_ratio",
        "Borenstein ch. 5 ln OR and SE (recalled) times Chinn's factor sqrt(3)/pi = 0.5513 "
        "(Chinn 2000, Stat Med 19:3127)",
    ),
    Published(
        "fisher z", "correlation", {"r": 0.5, "n": 100}, 0.5493, math.sqrt(0.0103), 2e-4,
        "fisher_z",
        "Borenstein et al. 2009 ch. 6: r = 0.50, n = 100, z = 0.5493, V_z = 0.0103 (recalled)",
    ),
    Published(
        "se from p", "mean_difference", {"estimate": 1.0, "p": 0.008}, 1.0, 1.0 / 2.652,
        2e-4, "p_value",
        "Cochrane Handbook v5.1 §7.7.3.3 (v6 §6.3.2): P = 0.008 gives Z = 2.652, "
        "SE = estimate / Z (read on a page quoting the Handbook)",
    ),
    *[
        Published(
            f"se from {level:.0%} ci", "mean_difference",
            {"estimate": 0.0, "lower": -width / 2, "upper": width / 2, "level": level},
            0.0, 1.0, 5e-4, "ci",
            f"Cochrane Handbook v6 §6.3.1: SE = (upper - lower) / {width} for a "
            f"{level:.0%} interval (read)",
        )
        for level, width in ((0.90, 3.29), (0.95, 3.92), (0.99, 5.15))
    ],
    Published(
        "se of log hr from ci", "hazard_ratio", {"estimate": 0.8, "lower": 0.64, "upper": 1.0},
        math.log(0.8), (math.log(1.0) - math.log(0.64)) / 3.92, 1e-4, "ci_log",
        "Cochrane Handbook v6 §6.3.2: ratio bounds are logged, then SE = (U - L) / 3.92 "
        "(invented numbers)",
    ),
    Published(
        "mean from sd", "mean", {"mean": 10.0, "sd": 4.0, "n": 16}, 10.0, 1.0, 1e-12,
        "mean_sd_n", "Cochrane Handbook v6 §6.5.2.2: SE = SD / sqrt(N) (invented numbers)",
    ),
    Published(
        "no non-events proportion", "proportion", {"events": 10, "total": 10},
        math.log(10.5 / 0.5), math.sqrt(1 / 10.5 + 1 / 0.5), 1e-12, "logit_counts",
        "0.5 added to events and non-events (common practice)",
    ),
    Published(
        "zero events proportion", "proportion", {"events": 0, "total": 10},
        math.log(0.5 / 10.5), math.sqrt(1 / 0.5 + 1 / 10.5), 1e-12, "logit_counts",
        "0.5 added to events and non-events (common practice), then the binomial logit "
        "variance 1/e + 1/(n - e)",
    ),
]  # fmt: skip


@pytest.mark.parametrize("case", PUBLISHED, ids=lambda c: c.label)
def test_published_examples(case: Published) -> None:
    got = derive(case.measure, case.reported)
    assert got.y == pytest.approx(case.y, abs=case.tol), case.source
    assert got.se == pytest.approx(case.se, abs=case.tol), case.source
    assert got.conversion == case.conversion
    assert got.scale == SPEC_SCALES[case.measure]


def test_borenstein_ch4_intermediate_values() -> None:
    """d, V_d and J of the ch. 4 example (recalled from memory), through the public
    Chinn helper: the odds-ratio path carries Cohen's d before the J correction."""
    lor = derive("odds_ratio", BORENSTEIN_CH4)
    d, var_d = log_odds_ratio_to_smd(lor.y, lor.se**2)
    g = derive("smd", BORENSTEIN_CH4)
    assert d == pytest.approx(0.5970, abs=5e-5)
    assert var_d == pytest.approx(0.0418, abs=5e-5)
    assert g.y / d == pytest.approx(0.9923, abs=5e-5)  # J = 1 - 3 / (4 * 98 - 1)


@pytest.mark.parametrize(("n", "rel"), [(3, 4e-3), (6, 1e-3), (11, 2e-4)])
def test_hedges_j_close_to_its_exact_gamma_form(n: int, rel: float) -> None:
    """J = 1 - 3/(4 df - 1) approximates Hedges' (1981) exact
    J = Γ(df/2) / (√(df/2) Γ((df-1)/2)) (evaluated with scipy) to within the tolerances
    here (0.27 %, 0.04 %, 0.008 % at df = 4, 10, 20); g / d is J."""
    row = {**GROUPS, "n_a": n, "n_b": n, "sd_b": 2.0}
    d, _ = log_odds_ratio_to_smd(derive("odds_ratio", row).y, 1.0)
    df = 2 * n - 2
    exact = math.exp(special.gammaln(df / 2) - special.gammaln((df - 1) / 2)) / math.sqrt(df / 2)
    assert derive("smd", row).y / d == pytest.approx(exact, rel=rel)


def test_smd_variance_at_small_samples() -> None:
    """Borenstein et al. 2009 ch. 4 formulas (recalled from memory) where the d² term of
    var_d matters: small groups, large effect (invented numbers)."""
    row = {"mean_a": 12.0, "sd_a": 2.0, "n_a": 5, "mean_b": 8.0, "sd_b": 3.0, "n_b": 7}
    s_within = math.sqrt((4 * 2.0**2 + 6 * 3.0**2) / 10)
    d = 4.0 / s_within
    var_d = 12 / 35 + d**2 / (2 * 12)
    j = 1 - 3 / (4 * 10 - 1)
    got = derive("smd", row)
    assert (got.y, got.se) == pytest.approx((j * d, j * math.sqrt(var_d)), rel=1e-12)


def test_chinn_factor() -> None:
    """Chinn 2000: d = ln(OR) sqrt(3)/pi, sqrt(3)/pi = 0.5513; ln OR = 1.81 d (read)."""
    d, var_d = log_odds_ratio_to_smd(1.0, 1.0)
    assert d == pytest.approx(0.5513, abs=5e-5)
    assert var_d == pytest.approx(0.5513**2, abs=1e-4)
    lor, _ = smd_to_log_odds_ratio(1.0, 1.0)
    assert lor == pytest.approx(1.81, abs=5e-3)


def test_chinn_borenstein_ch7_example() -> None:
    """Borenstein et al. 2009 ch. 7: ln OR = 0.9069, V = 0.0676 <-> d = 0.5000,
    V_d = 0.0205 (recalled from memory)."""
    d, var_d = log_odds_ratio_to_smd(0.9069, 0.0676)
    assert (d, var_d) == pytest.approx((0.5000, 0.0205), abs=1e-4)
    lor, var_lor = smd_to_log_odds_ratio(0.5, 0.0205)
    assert lor == pytest.approx(0.9069, abs=1e-4)
    assert var_lor == pytest.approx(0.0676, abs=5e-4)  # 0.0205 is rounded


# ---------------------------------------------------------------------------------------
# 2. Wan, Wang, Liu & Tong 2014 (BMC Med Res Methodol 14:135)

# Their Table 1: exact xi(n) = expected range of n standard normals (read).
WAN_TABLE_1 = {10: 3.078, 15: 3.472, 20: 3.735, 25: 3.931, 30: 4.086, 40: 4.322, 50: 4.498}


@pytest.mark.parametrize(("n", "xi"), WAN_TABLE_1.items())
def test_wan_range_divisor_matches_their_table_1(n: int, xi: float) -> None:
    """S1's SD divisor (Blom's approximation) is within 1 % of Wan et al.'s exact Table 1."""
    got = derive("mean", {"min": 0.0, "median": 5.0, "max": 10.0, "n": n})
    sd = got.se * math.sqrt(n)
    assert 10.0 / sd == pytest.approx(xi, rel=0.01)


def wan_reference(v: Mapping[str, float]) -> tuple[float, float]:
    """Wan et al. 2014 formulas (recalled from memory), with scipy's normal quantile."""
    n, m = v["n"], v["median"]
    xi = 2 * stats.norm.ppf((n - 0.375) / (n + 0.25))
    eta = 2 * stats.norm.ppf((0.75 * n - 0.125) / (n + 0.25))
    if "min" in v and "q1" in v:
        mean = (v["min"] + 2 * v["q1"] + 2 * m + 2 * v["q3"] + v["max"]) / 8
        sd = (v["max"] - v["min"]) / (2 * xi) + (v["q3"] - v["q1"]) / (2 * eta)
    elif "min" in v:
        mean, sd = (v["min"] + 2 * m + v["max"]) / 4, (v["max"] - v["min"]) / xi
    else:
        mean, sd = (v["q1"] + m + v["q3"]) / 3, (v["q3"] - v["q1"]) / eta
    return mean, sd / math.sqrt(n)


WAN_CASES = [  # invented summaries
    ("wan_median_range", {"min": 2.0, "median": 7.0, "max": 20.0, "n": 40}),
    ("wan_median_iqr", {"q1": 4.0, "median": 7.0, "q3": 11.0, "n": 40}),
    ("wan_five_number", {"min": 2.0, "q1": 4.0, "median": 7.0, "q3": 11.0, "max": 20.0, "n": 40}),
]


@pytest.mark.parametrize(("conversion", "reported"), WAN_CASES, ids=[c for c, _ in WAN_CASES])
def test_wan_formulas(conversion: str, reported: dict[str, float]) -> None:
    got = derive("mean", reported)
    assert (got.y, got.se) == pytest.approx(wan_reference(reported), rel=1e-12)
    assert got.conversion == conversion


@pytest.mark.parametrize(("conversion", "reported"), WAN_CASES, ids=[c for c, _ in WAN_CASES])
def test_wan_nearly_unbiased_for_normal_data(conversion: str, reported: dict[str, float]) -> None:
    """Wan et al. report their estimators nearly unbiased for normal data. Over 400 seeded
    samples of n = 50 from N(50, 10²) the average estimates are within about 4 Monte Carlo
    SEs (0.1 for the mean, 0.08 for the SD) of the true mean and SD."""
    n, reps = 50, 400
    x = np.random.default_rng(20140135).normal(50.0, 10.0, size=(reps, n))
    q1, median, q3 = np.quantile(x, [0.25, 0.5, 0.75], axis=1)
    columns = {"min": x.min(1), "q1": q1, "median": median, "q3": q3, "max": x.max(1)}
    fits = [
        derive("mean", {**{k: float(columns[k][i]) for k in reported if k != "n"}, "n": n})
        for i in range(reps)
    ]
    assert np.mean([f.y for f in fits]) == pytest.approx(50.0, abs=0.4)
    assert np.mean([f.se * math.sqrt(n) for f in fits]) == pytest.approx(10.0, rel=0.03)


# ---------------------------------------------------------------------------------------
# 3. The same models fitted by general-purpose libraries


def glm(endog: list, exog: list, family: object, offset: list | None = None) -> object:
    """A saturated GLM: its MLE and Wald SE are the closed-form count formulas."""
    model = sm.GLM(np.asarray(endog), np.asarray(exog, float), family=family, offset=offset)
    with warnings.catch_warnings():
        # One parameter per cell leaves no residual df and predicts every cell exactly.
        warnings.simplefilter("ignore", RuntimeWarning)
        warnings.simplefilter("ignore", PerfectSeparationWarning)
        return model.fit(tol=1e-13)


def ref_proportion(v: Mapping[str, float]) -> tuple[float, float]:
    fit = glm([[v["events"], v["total"] - v["events"]]], [[1.0]], sm.families.Binomial())
    return fit.params[0], fit.bse[0]


def ref_rate(v: Mapping[str, float]) -> tuple[float, float]:
    fit = glm([v["events"]], [[1.0]], sm.families.Poisson(), offset=[math.log(v["exposure"])])
    return fit.params[0], fit.bse[0]


def ref_rate_ratio(v: Mapping[str, float]) -> tuple[float, float]:
    fit = glm(
        [v["events_a"], v["events_b"]], [[1, 1], [1, 0]], sm.families.Poisson(),
        offset=np.log([v["exposure_a"], v["exposure_b"]]),
    )  # fmt: skip
    return fit.params[1], fit.bse[1]


def ref_logistic(v: Mapping[str, float]) -> tuple[float, float]:
    counts = [
        [v["events_a"], v["total_a"] - v["events_a"]],
        [v["events_b"], v["total_b"] - v["events_b"]],
    ]
    fit = glm(counts, [[1, 1], [1, 0]], sm.families.Binomial())
    return fit.params[1], fit.bse[1]


def table(v: Mapping[str, float], shift: float = 0.0) -> Table2x2:
    cells = [
        [v["events_a"], v["total_a"] - v["events_a"]],
        [v["events_b"], v["total_b"] - v["events_b"]],
    ]
    return Table2x2(np.asarray(cells, float) + shift, shift_zeros=False)


def ref_log_rr(v: Mapping[str, float]) -> tuple[float, float]:
    t = table(v)
    return t.log_riskratio, t.log_riskratio_se


def ref_log_rr_shifted(v: Mapping[str, float]) -> tuple[float, float]:
    t = table(v, 0.5)  # 0.5 added to every cell (common practice)
    return t.log_riskratio, t.log_riskratio_se


def ref_log_or_shifted(v: Mapping[str, float]) -> tuple[float, float]:
    t = table(v, 0.5)
    return t.log_oddsratio, t.log_oddsratio_se


def ref_welch(v: Mapping[str, float]) -> tuple[float, float]:
    """scipy's Welch t = D / sqrt(sd_a²/n_a + sd_b²/n_b), so SE = D / t."""
    diff = v["mean_a"] - v["mean_b"]
    t = stats.ttest_ind_from_stats(
        v["mean_a"], v["sd_a"], v["n_a"], v["mean_b"], v["sd_b"], v["n_b"], equal_var=False
    ).statistic
    return diff, diff / t


def ref_se_from_p(v: Mapping[str, float], scale: str) -> tuple[float, float]:
    y = math.log(v["estimate"]) if scale == "log" else v["estimate"]
    return y, abs(y) / stats.norm.isf(v["p"] / 2)


def ref_delta(v: Mapping[str, float], g: Callable[[float], float]) -> tuple[float, float]:
    """Delta method with scipy's numerical derivative of the reference transform."""
    slope = derivative(g, v["estimate"], initial_step=1e-3).df
    return g(v["estimate"]), abs(slope) * v["se"]


def ref_ci(v: Mapping[str, float], g: Callable[[float], float]) -> tuple[float, float]:
    z = z_two_sided(v.get("level", 0.95))
    return g(v["estimate"]), (g(v["upper"]) - g(v["lower"])) / (2 * z)


class Reference(NamedTuple):
    label: str
    measure: str
    reported: dict[str, float]
    reference: Callable[[Mapping[str, float]], tuple[float, float]]
    corrected: bool = False


REFERENCES = [  # invented numbers; the reference computes the expected values
    Reference("logit of a proportion, GLM", "proportion", {"events": 17, "total": 60},
              ref_proportion),
    Reference("log rate, Poisson GLM", "rate", {"events": 23, "exposure": 140.5}, ref_rate),
    Reference("log rate ratio, Poisson GLM", "rate_ratio",
              {"events_a": 12, "exposure_a": 310.0, "events_b": 25, "exposure_b": 295.5},
              ref_rate_ratio),
    Reference("log odds ratio, logistic GLM", "odds_ratio",
              {"events_a": 7, "total_a": 48, "events_b": 16, "total_b": 51}, ref_logistic),
    Reference("log risk ratio, statsmodels 2x2", "risk_ratio",
              {"events_a": 7, "total_a": 48, "events_b": 16, "total_b": 51}, ref_log_rr),
    Reference("zero cell risk ratio", "risk_ratio",
              {"events_a": 0, "total_a": 20, "events_b": 5, "total_b": 20},
              ref_log_rr_shifted, corrected=True),
    Reference("zero cell odds ratio", "odds_ratio",
              {"events_a": 20, "total_a": 20, "events_b": 5, "total_b": 20},
              ref_log_or_shifted, corrected=True),
    Reference("mean difference, Welch t", "mean_difference",
              {"mean_a": 12.1, "sd_a": 3.4, "n_a": 25, "mean_b": 10.2, "sd_b": 5.0, "n_b": 31},
              ref_welch),
    Reference("p-value, identity", "coefficient", {"estimate": -0.42, "p": 0.031},
              lambda v: ref_se_from_p(v, "identity")),
    Reference("p-value, log", "risk_ratio", {"estimate": 1.35, "p": 0.0004},
              lambda v: ref_se_from_p(v, "log")),
    Reference("tiny p-value", "hazard_ratio", {"estimate": 0.5, "p": 1e-30},
              lambda v: ref_se_from_p(v, "log")),
    Reference("se of a proportion, delta", "proportion", {"estimate": 0.2, "se": 0.04},
              lambda v: ref_delta(v, special.logit)),
    Reference("se of a rate, delta", "rate", {"estimate": 0.35, "se": 0.05},
              lambda v: ref_delta(v, np.log)),
    Reference("se of a correlation, delta", "correlation", {"estimate": -0.3, "se": 0.08},
              lambda v: ref_delta(v, np.arctanh)),
    Reference("se of a log hazard ratio", "hazard_ratio", {"estimate": 0.7, "se": 0.12},
              lambda v: (math.log(v["estimate"]), v["se"])),
    Reference("ci of a proportion", "proportion",
              {"estimate": 0.3, "lower": 0.2, "upper": 0.42}, lambda v: ref_ci(v, special.logit)),
    Reference("80% ci of a correlation", "correlation",
              {"estimate": 0.45, "lower": 0.3, "upper": 0.58, "level": 0.8},
              lambda v: ref_ci(v, np.arctanh)),
    Reference("ci of a rate ratio", "rate_ratio", {"estimate": 0.7, "lower": 0.5, "upper": 0.98},
              lambda v: ref_ci(v, np.log)),
]  # fmt: skip


@pytest.mark.parametrize("case", REFERENCES, ids=lambda c: c.label)
def test_against_reference_libraries(case: Reference) -> None:
    got = derive(case.measure, case.reported)
    y, se = case.reference(case.reported)
    assert got.y == pytest.approx(float(y), rel=1e-7, abs=1e-10)
    assert got.se == pytest.approx(float(se), rel=1e-6)
    assert bool(got.corrections) == case.corrected


def test_fisher_z_interval_matches_scipy_pearsonr() -> None:
    """scipy's Pearson CI is tanh(atanh r ± z / sqrt(n - 3)); ours must give the same."""
    rng = np.random.default_rng(1921)
    x = rng.normal(size=40)
    res = stats.pearsonr(x, 0.6 * x + rng.normal(size=40))
    got = derive("correlation", {"r": float(res.statistic), "n": 40})
    z = z_two_sided(0.9)
    ci = res.confidence_interval(0.9)
    assert math.tanh(got.y - z * got.se) == pytest.approx(ci.low, rel=1e-10)
    assert math.tanh(got.y + z * got.se) == pytest.approx(ci.high, rel=1e-10)


def test_rate_ratio_zero_arm_corrects_both_arms() -> None:
    """0.5 added to the events of both arms (common practice), then the Poisson GLM."""
    got = derive(
        "rate_ratio", {"events_a": 0, "exposure_a": 100.0, "events_b": 4, "exposure_b": 90.0}
    )
    y, se = ref_rate_ratio({"events_a": 0.5, "exposure_a": 100.0, "events_b": 4.5,
                            "exposure_b": 90.0})  # fmt: skip
    assert (got.y, got.se) == pytest.approx((y, se), rel=1e-7)
    assert got.corrections == ("continuity correction 0.5 added to the events of both arms",)


# ---------------------------------------------------------------------------------------
# 4. Properties (derandomized hypothesis runs)

SPAN = {  # analysis-scale centres and SEs that keep the interval inside the scale's domain
    "identity": (st.floats(-50, 50), st.floats(1e-3, 20)),
    "log": (st.floats(-5, 5), st.floats(1e-3, 1.5)),
    "logit": (st.floats(-5, 5), st.floats(1e-3, 0.5)),
    "fisher_z": (st.floats(-2, 2), st.floats(1e-3, 0.5)),
}


@st.composite
def symmetric_intervals(draw: st.DrawFn) -> tuple[str, float, float, float]:
    measure = draw(st.sampled_from(MEASURES))
    centre, spread = SPAN[SPEC_SCALES[measure]]
    if measure == "risk_difference":  # natural values must stay in [-1, 1]
        centre, spread = st.floats(-0.5, 0.5), st.floats(1e-3, 0.19)
    return measure, draw(centre), draw(spread), draw(st.floats(0.5, 0.99))


@SEEDED
@given(symmetric_intervals())
def test_interval_round_trip(case: tuple[str, float, float, float]) -> None:
    """An interval symmetric on the analysis scale -> (y, se) -> y ± z se -> the interval."""
    measure, y, se, level = case
    scale, z = SPEC_SCALES[measure], z_two_sided(level)
    lower, upper = to_natural(scale, y - z * se), to_natural(scale, y + z * se)
    reported = {"estimate": to_natural(scale, y), "lower": lower, "upper": upper, "level": level}
    got = derive(measure, reported)
    assert got.y == pytest.approx(y, rel=1e-9, abs=1e-9)
    assert got.se == pytest.approx(se, rel=1e-7)
    assert to_natural(scale, got.y - z * got.se) == pytest.approx(lower, rel=1e-9, abs=1e-12)
    assert to_natural(scale, got.y + z * got.se) == pytest.approx(upper, rel=1e-9, abs=1e-12)


def swap(reported: Mapping[str, float]) -> dict[str, float]:
    flip = {"a": "b", "b": "a"}
    return {f"{k[:-1]}{flip[k[-1]]}": x for k, x in reported.items()}


@st.composite
def two_arm_rows(draw: st.DrawFn) -> tuple[str, dict[str, float]]:
    form = draw(st.sampled_from(["2x2", "rates", "groups"]))
    row: dict[str, float] = {}
    for arm in "ab":
        if form == "2x2":
            total = draw(st.integers(1, 400))
            row |= {f"events_{arm}": draw(st.integers(0, total)), f"total_{arm}": total}
        elif form == "rates":
            row |= {
                f"events_{arm}": draw(st.integers(0, 400)),
                f"exposure_{arm}": draw(st.floats(0.1, 1e4)),
            }
        else:
            row |= {
                f"mean_{arm}": draw(st.floats(-100, 100)),
                f"sd_{arm}": draw(st.floats(0.1, 50)),
                f"n_{arm}": draw(st.integers(2, 400)),
            }
    measures = {
        "2x2": ["odds_ratio", "risk_ratio", "risk_difference", "smd"],
        "rates": ["rate_ratio"],
        "groups": ["mean_difference", "smd", "odds_ratio"],
    }[form]
    return draw(st.sampled_from(measures)), row


@SEEDED
@given(two_arm_rows())
def test_swapping_arms_flips_the_sign(case: tuple[str, dict[str, float]]) -> None:
    measure, row = case
    forward, backward = derive(measure, row), derive(measure, swap(row))
    assert backward.y == pytest.approx(-forward.y, rel=1e-9, abs=1e-12)
    assert backward.se == pytest.approx(forward.se, rel=1e-9)


# ---------------------------------------------------------------------------------------
# 5. Validation: every rule names the column at fault

EST_CI = {"estimate": 1.2, "lower": 0.9, "upper": 1.6}

INVALID = [  # (measure, reported, field, a fragment of the message)
    ("odds", {"estimate": 1.0, "se": 0.1}, "measure", "measure must be one of"),
    ("mean_difference", {"estimate": 1.0, "lower": 1.5, "upper": 3.0}, "lower", "at most"),
    ("mean_difference", {"estimate": 4.0, "lower": 1.5, "upper": 3.0}, "upper", "at least"),
    ("mean_difference", {"estimate": 2.0, "lower": 2.0, "upper": 2.0}, "upper", "greater"),
    ("odds_ratio", {**EST_CI, "estimate": 0.0}, "estimate", "greater than 0"),
    ("odds_ratio", {**EST_CI, "lower": -0.1}, "lower", "greater than 0"),
    ("hazard_ratio", {"estimate": -0.5, "se": 0.1}, "estimate", "greater than 0"),
    ("risk_ratio", {"estimate": 0.0, "p": 0.04}, "estimate", "greater than 0"),
    ("mean", {"mean": 3.0, "sd": 0.0, "n": 10}, "sd", "greater than 0"),
    ("smd", {**GROUPS, "sd_a": -1.0}, "sd_a", "got -1"),
    ("coefficient", {"estimate": 0.3, "se": 0.0}, "se", "greater than 0"),
    ("proportion", {"events": 11, "total": 10}, "events", "at most total"),
    ("odds_ratio", {"events_a": 1, "total_a": 9, "events_b": 12, "total_b": 9}, "events_b",
     "at most total_b"),
    ("proportion", {"events": -1, "total": 10}, "events", "whole number"),
    ("proportion", {"events": 2, "total": 10.5}, "total", "whole number"),
    ("proportion", {"events": 0, "total": 0}, "total", "1 or more"),
    ("mean_difference", {**GROUPS, "n_a": 20.5}, "n_a", "whole number"),
    ("rate", {"events": 3, "exposure": 0.0}, "exposure", "greater than 0"),
    ("rate_ratio", {"events_a": 3, "exposure_a": 9.0, "events_b": 3, "exposure_b": -1.0},
     "exposure_b", "greater than 0"),
    ("risk_ratio", {**EST_CI, "level": 95}, "level", "0.95 for a 95% interval"),
    ("risk_ratio", {**EST_CI, "level": 0.0}, "level", "between 0 and 1"),
    ("risk_ratio", {"estimate": 1.2, "p": 0.0}, "p", "between 0 and 1"),
    ("risk_ratio", {"estimate": 1.2, "p": 1.0}, "p", "between 0 and 1"),
    ("mean", {"mean": 3.0, "sd": 1.0, "n": 1}, "n", "2 or more"),
    ("smd", {**GROUPS, "n_b": 1}, "n_b", "2 or more"),
    ("correlation", {"r": 0.3, "n": 3}, "n", "at least 4"),
    ("correlation", {"r": 1.0, "n": 30}, "r", "between -1 and 1"),
    ("correlation", {"r": -1.2, "n": 30}, "r", "between -1 and 1"),
    ("correlation", {"estimate": 1.0, "lower": 0.5, "upper": 1.0}, "estimate", "between -1 and 1"),
    ("proportion", {"estimate": 0.0, "lower": 0.0, "upper": 0.05}, "estimate", "between 0 and 1"),
    ("proportion", {"estimate": 1.2, "se": 0.1}, "estimate", "between 0 and 1"),
    ("proportion", {"estimate": 0.9, "lower": 0.8, "upper": 1.0}, "upper", "between 0 and 1"),
    ("risk_difference", {"estimate": 1.5, "se": 0.1}, "estimate", "between -1 and 1"),
    ("mean", {"median": 5, "q1": 6, "q3": 8, "n": 20}, "median", "at least q1"),
    ("mean", {"median": 5, "q1": 3, "q3": 4, "n": 20}, "q3", "at least median"),
    ("mean", {"min": 4, "q1": 3, "median": 5, "q3": 8, "max": 9, "n": 20}, "q1", "at least min"),
    ("mean", {"median": 5, "q1": 5, "q3": 5, "n": 20}, "q3", "greater than q1"),
    ("mean", {"median": 5, "min": 5, "max": 5, "n": 20}, "max", "greater than min"),
    ("mean_difference", {"estimate": 1.0, "lower": 0.5}, "upper", "also needs upper"),
    ("odds_ratio", {"events_a": 1, "total_a": 9, "events_b": 2}, "total_b", "also needs total_b"),
    ("smd", {k: x for k, x in GROUPS.items() if k != "n_b"}, "n_b", "also needs n_b"),
    ("mean", {"median": 5, "q1": 3, "n": 20}, "q3", "also needs q3"),
    ("proportion", {}, "estimate", "no reported numbers"),
    ("odds_ratio", {"events": 3}, "events", "not part of any reported form"),
    ("risk_ratio", {**EST_CI, "se": 0.1}, "se", "also fills 'estimate, se'"),
    ("proportion", {"events": 3, "total": 10, "level": 0.9}, "level", "not part of"),
    ("correlation", {"mean": 1, "sd": 2, "r": 0.3, "n": 30}, "mean", "also fills 'mean, sd, n'"),
    ("mean", {"median": 5, "q1": 3, "q3": 8, "min": 1, "n": 20}, "min", "also need max"),
    ("odds_ratio", {"events": 3, "total": 10}, "measure", "gives proportion"),
    ("proportion", {"estimate": 0.3, "p": 0.01}, "measure", "null value"),
    ("rate", {"estimate": 0.3, "p": 0.01}, "measure", "null value"),
    ("mean", {"estimate": 3.0, "p": 0.01}, "measure", "null value"),
    ("mean_difference", {"estimate": 0.0, "p": 0.5}, "estimate", "differ from the null"),
    ("odds_ratio", {"estimate": 1.0, "p": 0.9}, "estimate", "differ from the null"),
    ("coefficient", {"estimate": 1.0, "stderr": 0.2}, "stderr", "not a numeric column"),
    ("coefficient", {"estimate": math.nan, "se": 0.2}, "estimate", "finite"),
]  # fmt: skip


@pytest.mark.parametrize(("measure", "reported", "field", "says"), INVALID)
def test_invalid_rows_name_the_column(
    measure: str, reported: dict[str, float], field: str, says: str
) -> None:
    with pytest.raises(ConversionError) as caught:
        derive(measure, reported)
    assert caught.value.field == field
    assert says in caught.value.message


@SEEDED
@given(st.integers(1, 10_000), st.integers(1, 100))
def test_events_above_total(total: int, excess: int) -> None:
    with pytest.raises(ConversionError) as caught:
        derive("proportion", {"events": total + excess, "total": total})
    assert caught.value.field == "events"


@SEEDED
@given(
    st.sampled_from(["events_a", "total_a", "events_b", "total_b"]),
    st.floats(0.01, 0.99),
)
def test_fractional_counts(column: str, fraction: float) -> None:
    row = {"events_a": 3, "total_a": 30, "events_b": 5, "total_b": 30}
    row[column] += fraction
    with pytest.raises(ConversionError) as caught:
        derive("risk_ratio", row)
    assert caught.value.field == column


@SEEDED
@given(st.sampled_from(MEASURES), st.booleans())
def test_interval_must_contain_the_estimate(measure: str, below: bool) -> None:
    scale = SPEC_SCALES[measure]
    lo, est, hi = (to_natural(scale, y) for y in (-0.4, -0.2, 0.3))
    row = {"estimate": lo, "lower": est, "upper": hi} if below else {
        "estimate": hi, "lower": lo, "upper": est}  # fmt: skip
    with pytest.raises(ConversionError) as caught:
        derive(measure, row)
    assert caught.value.field == ("lower" if below else "upper")


# ---------------------------------------------------------------------------------------
# 6. Scales and tables


def test_scales_follow_the_spec() -> None:
    assert ANALYSIS_SCALE == SPEC_SCALES
    assert set(MEASURES) == set(SPEC_SCALES)
    assert all(MEASURE_TABLE[m].meaning for m in MEASURES)
    assert set(scales.NATURAL_NAME) == set(scales.SCALES) == set(SPEC_SCALES.values())


REFERENCE_TRANSFORMS = {  # scale -> (numpy/scipy forward, inverse, a natural-scale sample)
    "identity": (lambda x: x, lambda y: y, st.floats(-1e6, 1e6)),
    "log": (np.log, np.exp, st.floats(1e-300, 1e300)),
    "logit": (special.logit, special.expit, st.floats(1e-12, 1 - 1e-12)),
    "fisher_z": (np.arctanh, np.tanh, st.floats(-1 + 1e-12, 1 - 1e-12)),
}


@pytest.mark.parametrize("scale", REFERENCE_TRANSFORMS)
def test_transforms_match_numpy_and_scipy(scale: str) -> None:
    forward, inverse, sample = REFERENCE_TRANSFORMS[scale]

    @SEEDED
    @given(sample)
    def check(x: float) -> None:
        assert to_analysis(scale, x) == pytest.approx(float(forward(x)), rel=1e-12, abs=1e-12)
        y = float(forward(x))
        assert to_natural(scale, y) == pytest.approx(float(inverse(y)), rel=1e-12, abs=1e-300)

    check()


@pytest.mark.parametrize(("scale", "x"), [("log", 0.0), ("logit", 1.0), ("fisher_z", -1.0)])
def test_transform_refuses_values_outside_its_domain(scale: str, x: float) -> None:
    with pytest.raises(ConversionError):
        to_analysis(scale, x)


@pytest.mark.parametrize("module", [convert, scales], ids=["convert", "scales"])
def test_stays_stdlib_only(module: object) -> None:
    """The CLI imports this layer at start-up: no numpy, scipy or pandas in it."""
    tree = ast.parse(Path(str(module.__file__)).read_text())
    imported = {
        alias.name.split(".")[0] for node in ast.walk(tree) if isinstance(node, ast.Import)
        for alias in node.names
    } | {
        node.module.split(".")[0] for node in ast.walk(tree)
        if isinstance(node, ast.ImportFrom) and node.module
    }  # fmt: skip
    assert not imported & {"numpy", "scipy", "pandas"}


# SPEC.md, "Extraction sheets": the columns of the reported forms.
SPEC_FORMS = """estimate lower upper level | estimate se | estimate p | events total |
events exposure | events_a total_a events_b total_b exposure_a exposure_b |
mean_a sd_a n_a mean_b sd_b n_b | mean sd n | median q1 q3 n min max | r n"""


def test_numeric_fields_are_the_spec_columns() -> None:
    spec = set(SPEC_FORMS.replace("|", " ").split())
    assert set(NUMERIC_FIELDS) == spec
    assert len(NUMERIC_FIELDS) == len(spec)
