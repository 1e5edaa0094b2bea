"""Checks of a built prior: predictive, posterior, conflict, sensitivity, and their commands.

References: scipy.stats (betabinom, nbinom with n = a, p = b/(b+E), norm); the conjugate
closed forms Beta(a + x, b + n - x), Gamma(a + x, b + E) and the normal-normal update (common
practice); dense grids written here; seeded Monte Carlo from the prior predictive; the BCG
trials (Colditz et al. 1994, JAMA 271:698; counts in tests/test_frequentist.py).
"""

from __future__ import annotations

import hashlib
import itertools
import json
import math
from pathlib import Path

import numpy as np
import pytest
from scipy import integrate, stats

from registry.checks.posterior import posterior
from registry.checks.predictive import predictive, tail_probability
from registry.checks.study import Study, observed, planned
from registry.errors import InputError
from registry.values.prior import Component, Prior
from tests.test_priors import BASE, bcg  # noqa: F401  (the BCG registry fixture)

BETA_MIX = Prior.candidate(
    "probability",
    (Component("beta", {"a": 3.0, "b": 7.0}, 0.8), Component("beta", {"a": 1.0, "b": 1.0}, 0.2)),
)
GAMMA_MIX = Prior.candidate(
    "rate",
    (
        Component("gamma", {"a": 20.0, "scale": 0.05}, 0.7),
        Component("gamma", {"a": 1.0, "scale": 1.0}, 0.3),
    ),
)


def test_beta_predictive_is_the_betabinomial_mixture() -> None:
    """scipy.stats.betabinom, mixed with the prior's weights."""
    d = predictive(BETA_MIX, planned("proportion", n=40))
    k = np.arange(41)
    want = 0.8 * stats.betabinom.pmf(k, 40, 3, 7) + 0.2 * stats.betabinom.pmf(k, 40, 1, 1)
    np.testing.assert_allclose(d.pmf, want, rtol=1e-12, atol=1e-15)
    mean = 0.8 * stats.betabinom.mean(40, 3, 7) + 0.2 * stats.betabinom.mean(40, 1, 1)
    assert d.mean == pytest.approx(mean, rel=1e-12)


def test_gamma_predictive_is_the_negative_binomial_mixture() -> None:
    """scipy.stats.nbinom with n = a and p = rate / (rate + E) (its standard parameterisation)."""
    e = 30.0
    d = predictive(GAMMA_MIX, planned("rate", exposure=e))
    want = 0.7 * stats.nbinom.pmf(d.k, 20, 20 / (20 + e)) + 0.3 * stats.nbinom.pmf(
        d.k, 1, 1 / (1 + e)
    )
    np.testing.assert_allclose(d.pmf, want, rtol=1e-12, atol=1e-15)
    assert d.quantile(0.5) == pytest.approx(np.searchsorted(np.cumsum(want), 0.5))


def test_normal_predictive_is_the_closed_form_and_lognormal_agrees_numerically() -> None:
    """y ~ N(m, s² + S²) (common practice); a log-normal prior's log is N(log scale, s²)."""
    prior = Prior.candidate("log", (Component("normal", {"loc": -0.3, "scale": 0.2}),))
    d = predictive(prior, planned("rate_ratio", se=0.15))
    ref = stats.norm(-0.3, math.hypot(0.2, 0.15))
    assert d.mean == pytest.approx(-0.3) and d.sd == pytest.approx(ref.std())
    assert d.quantile(0.975) == pytest.approx(ref.ppf(0.975), abs=1e-8)
    lognormal = Prior.candidate(
        "ratio", (Component("lognormal", {"s": 0.2, "scale": math.exp(-0.3)}),)
    )
    g = predictive(lognormal, planned("rate_ratio", se=0.15))
    assert g.quantile(0.975) == pytest.approx(ref.ppf(0.975), abs=1e-4)
    assert g.sd == pytest.approx(ref.std(), rel=1e-4)


def test_beta_and_gamma_posteriors_are_the_conjugate_closed_forms() -> None:
    """Beta(a + x, b + n - x) and Gamma(a + x, rate b + E); weights w_j m_j by hand."""
    post = posterior(BETA_MIX, observed("proportion", events=12, n=20))
    assert post.components[0] == {"weight": post.weights[0], "family": "beta", "a": 15.0, "b": 15.0}
    m = [stats.betabinom.pmf(12, 20, 3, 7), stats.betabinom.pmf(12, 20, 1, 1)]
    w = np.array([0.8 * m[0], 0.2 * m[1]])
    np.testing.assert_allclose(post.weights, w / w.sum(), rtol=1e-10)
    post = posterior(GAMMA_MIX, observed("rate", events=15, exposure=30))
    assert post.components[0]["a"] == 35.0
    assert post.components[0]["scale"] == pytest.approx(1 / (20 + 30))


def _grid_posterior(logprior, loglik, lo: float, hi: float) -> tuple[float, float]:
    """Mean and sd on a dense uniform grid (200,001 points, Simpson's rule)."""
    x = np.linspace(lo, hi, 200_001)
    lp = logprior(x) + loglik(x)
    f = np.exp(lp - lp.max())
    z = integrate.simpson(f, x=x)
    mean = integrate.simpson(x * f, x=x) / z
    return mean, math.sqrt(integrate.simpson((x - mean) ** 2 * f, x=x) / z)


@pytest.mark.parametrize(
    ("prior", "study", "logprior", "loglik", "bounds"),
    [
        (
            Prior.candidate(
                "identity", (Component("student_t", {"df": 4, "loc": 0.1, "scale": 0.3}),)
            ),
            Study("normal", 0.2, 0.5),
            stats.t(4, 0.1, 0.3).logpdf,
            lambda x: stats.norm.logpdf(0.5, x, 0.2),
            (-8, 8),
        ),
        (
            Prior.candidate(
                "logit",
                (
                    Component("normal", {"loc": -0.8, "scale": 0.5}, 0.6),
                    Component("student_t", {"df": 3, "loc": 0.0, "scale": 1.0}, 0.4),
                ),
            ),
            Study("binomial", 50, 21),
            lambda x: np.logaddexp(
                math.log(0.6) + stats.norm(-0.8, 0.5).logpdf(x),
                math.log(0.4) + stats.t(3).logpdf(x),
            ),
            lambda x: stats.binom.logpmf(21, 50, 1 / (1 + np.exp(-x))),
            (-15, 15),
        ),
    ],
)
def test_numerical_posteriors_match_a_dense_grid(prior, study, logprior, loglik, bounds) -> None:
    post = posterior(prior, study)
    mean, sd = _grid_posterior(logprior, loglik, *bounds)
    assert post.summary.mean == pytest.approx(mean, abs=1e-3 * sd)
    assert post.summary.sd == pytest.approx(sd, rel=2e-3)
    assert post.accuracy < 1e-2


def test_lognormal_rate_with_poisson_data_matches_a_dense_grid() -> None:
    prior = Prior.candidate("rate", (Component("lognormal", {"s": 0.4, "scale": 0.8}),))
    post = posterior(prior, observed("rate", events=40, exposure=30))
    x = np.linspace(1e-4, 6, 400_001)
    lp = stats.lognorm(0.4, scale=0.8).logpdf(x) + stats.poisson.logpmf(40, 30 * x)
    f = np.exp(lp - lp.max())
    mean = integrate.simpson(x * f, x=x) / integrate.simpson(f, x=x)
    assert post.summary.mean == pytest.approx(mean, rel=1e-4)


def test_box_tail_probability_matches_monte_carlo() -> None:
    """Seeded draws from the prior predictive: theta from the prior, then the count."""
    rng = np.random.default_rng(20260101)
    draws = BETA_MIX.rvs(400_000, seed=7)
    y = rng.binomial(40, draws)
    for observed_y in (3, 12, 30):
        lower, upper = np.mean(y <= observed_y), np.mean(y >= observed_y)
        mc = min(1.0, 2 * min(lower, upper))
        error = 2 * math.sqrt(mc * (1 - mc) / len(y)) + 1e-6
        got = tail_probability(predictive(BETA_MIX, planned("proportion", n=40)), observed_y)
        assert abs(got - mc) < 4 * error


@pytest.mark.parametrize(
    ("measure", "options", "field"),
    [
        ("proportion", {"events": 5, "n": 4}, "--events"),
        ("rate", {"events": 5, "exposure": -1}, "--exposure"),
        ("rate", {"events": 5, "n": 10}, "--n"),
        ("rate_ratio", {"events": 5, "n": 10}, "--events"),
        ("proportion", {"events": 2.5, "n": 10}, "--events"),
    ],
)
def test_bad_data_names_the_option(measure: str, options: dict, field: str) -> None:
    with pytest.raises(InputError) as caught:
        observed(measure, **options)
    assert caught.value.field == field


DEFINITION = BASE.replace('target = "mean"', 'target = "mean"').replace(
    '[discount]\nmechanism = "none"', '[discount]\nmechanism = "none"\nrobust_weight = 0.2'
)


def _digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_commands_on_the_bcg_prior_write_nothing(cli, bcg, tmp_path: Path) -> None:  # noqa: F811
    definition = tmp_path / "bcg.toml"
    definition.write_text(DEFINITION)
    assert cli("build", definition, "--db", bcg).code == 0
    before = _digest(bcg)
    r = cli("predict", "bcg", "--se", "0.2", "--json", "--db", bcg)
    assert r.code == 0 and _digest(bcg) == before
    doc = json.loads(r.stdout)
    assert {"prior", "design", "outcome", "mean", "sd", "quantiles", "plausible"} <= set(doc)
    r = cli("update", "bcg", "--estimate", "-0.5", "--se", "0.2", "--json", "--db", bcg)
    assert r.code == 0 and _digest(bcg) == before
    doc = json.loads(r.stdout)
    assert {"prior", "data", "posterior", "weights", "conflict"} <= set(doc)
    assert {"p_value", "method", "level", "conflict"} <= set(doc["conflict"])
    assert {"components", "mean", "sd", "quantiles"} <= set(doc["posterior"])
    update = doc
    sweep = ("sensitivity", "bcg", "--estimate", "-0.5", "--se", "0.2", "--over")
    sweep += ("robust_weight", "--probability-below", "-0.4", "--json", "--db", bcg)
    r = cli(*sweep, "--values", "0,0.2,0.5,1", "--decide", "0.5")
    assert r.code == 0 and _digest(bcg) == before
    doc = json.loads(r.stdout)
    assert {"prior", "over", "rows", "tipping_point"} <= set(doc)
    # at the stored weight the sweep is the update of the stored prior
    row = next(x for x in doc["rows"] if x["value"] == 0.2)
    assert row["posterior"]["mean"] == pytest.approx(update["posterior"]["mean"], rel=1e-9)
    # at weight 1 it is the update of the vague component alone (normal-normal closed form)
    vague = json.loads(cli("prior", "bcg", "--json", "--db", bcg).stdout)["robust"]["component"]
    m, s = vague["loc"], vague["scale"]
    precision = 1 / s**2 + 1 / 0.2**2
    last = doc["rows"][-1]
    assert last["posterior"]["mean"] == pytest.approx((m / s**2 - 0.5 / 0.2**2) / precision)
    # the tipping point lies between the rows whose probability crosses 0.5 (bisection check)
    tp = doc["tipping_point"]
    probs = [(x["value"], x["probability"]) for x in doc["rows"]]
    crossing = [
        (a, b) for (a, pa), (b, pb) in itertools.pairwise(probs) if (pa - 0.5) * (pb - 0.5) < 0
    ]
    if crossing:
        lo, hi = crossing[0]
        assert lo <= tp <= hi
        near = [
            json.loads(cli(*sweep, "--values", f"{v}").stdout)["rows"][0]["probability"]
            for v in (max(tp - 2e-3, 0), min(tp + 2e-3, 1))
        ]
        assert (near[0] - 0.5) * (near[1] - 0.5) <= 0
    else:
        assert tp is None
    bad = cli("update", "bcg", "--events", "3", "--n", "10", "--db", bcg)
    assert bad.code == 2 and len(bad.stderr.strip().splitlines()) == 1
    assert _digest(bcg) == before


# --- the sweep at power 1, warnings, the conflict level, plots ------------------------------


@pytest.fixture
def bcg_prior(cli, bcg, tmp_path: Path) -> Path:  # noqa: F811
    """The BCG trials' common-effect prior of the mean log risk ratio (BASE: one normal, fast)."""
    definition = tmp_path / "bcg-base.toml"
    definition.write_text(BASE)
    assert cli("build", definition, "--db", bcg).code == 0
    return bcg


NEW = ("--estimate", "-0.5", "--se", "0.2")


def _normal_update(m: float, s: float, y: float, se: float) -> tuple[float, float]:
    """Normal prior N(m, s²), estimate y with standard error se (common practice)."""
    precision = 1 / s**2 + 1 / se**2
    return (m / s**2 + y / se**2) / precision, math.sqrt(1 / precision)


def test_power_sweep_at_one_is_the_update_of_the_stored_prior(cli, bcg_prior: Path) -> None:
    """Power 1 rebuilds the stored prior; power a divides each study's information by 1/a, so
    the common effect's sd becomes sd/sqrt(a) (power prior with a normal likelihood, common
    practice). Reference: statsmodels' common-effect estimate of the BCG trials."""
    from statsmodels.stats.meta_analysis import combine_effects

    from tests.test_frequentist import SE, Y

    updated = json.loads(cli("update", "bcg", *NEW, "--json", "--db", bcg_prior).stdout)
    sweep = ("sensitivity", "bcg", *NEW, "--over", "power", "--values", "0.5,1", "--json")
    sweep = json.loads(cli(*sweep, "--db", bcg_prior).stdout)
    at = {row["value"]: row["posterior"] for row in sweep["rows"]}
    post = updated["posterior"]
    assert at[1.0]["mean"] == pytest.approx(post["mean"], rel=1e-9)
    assert at[1.0]["sd"] == pytest.approx(post["sd"], rel=1e-9)
    for q, v in post["quantiles"].items():
        assert at[1.0]["quantiles"][q] == pytest.approx(v, rel=1e-9)
    reference = combine_effects(Y, SE**2)
    for power in (0.5, 1.0):
        mean, sd = _normal_update(
            reference.mean_effect_fe, reference.sd_eff_w_fe / math.sqrt(power), -0.5, 0.2
        )
        assert at[power]["mean"] == pytest.approx(mean, abs=1e-6)
        assert at[power]["sd"] == pytest.approx(sd, abs=1e-6)


def test_stale_prior_warns_on_every_check(cli, bcg_prior: Path) -> None:
    """A source of the stored prior retracted after the build: each command still answers
    (exit 0, one JSON document) and warns on stderr."""
    assert cli("sources", "retract", "bcg03", "--reason", "notice", "--db", bcg_prior).code == 0
    for args in (
        ("predict", "bcg", "--se", "0.2"),
        ("update", "bcg", *NEW),
        ("sensitivity", "bcg", *NEW, "--over", "power", "--values", "1"),
    ):
        r = cli(*args, "--json", "--db", bcg_prior)
        assert r.code == 0, r.stderr
        assert any(
            line.startswith("warning: bcg@1 is stale") and "bcg03" in line and "retracted" in line
            for line in r.stderr.splitlines()
        ), r.stderr
        assert json.loads(r.stdout)["warnings"]


def test_conflict_level_sets_the_exit_code(cli, bcg_prior: Path) -> None:
    """Box's two-sided tail probability for a normal prior N(m, s²) and an estimate y with
    standard error S: 2 min(F(y), 1 - F(y)), F the N(m, s² + S²) cdf (common practice)."""
    prior = json.loads(cli("prior", "bcg", "--json", "--db", bcg_prior).stdout)
    (component,) = prior["components"]
    m, s = component["loc"], component["scale"]
    y, se = 0.1, 0.15
    f = stats.norm.cdf(y, m, math.hypot(s, se))
    p = 2 * min(f, 1 - f)
    assert 1e-4 < p < 0.5  # so that both levels below are valid
    data = ("--estimate", str(y), "--se", str(se), "--db", bcg_prior)
    r = cli("update", "bcg", *data, "--conflict-level", f"{1.5 * p:.6g}", "--json")
    assert r.code == 1
    assert json.loads(r.stdout)["conflict"]["p_value"] == pytest.approx(p, rel=1e-6)
    assert json.loads(r.stdout)["conflict"]["conflict"] is True
    assert r.stderr.strip().splitlines()[-1].startswith("error: prior-data conflict")
    r = cli("update", "bcg", *data, "--conflict-level", f"{p / 1.5:.6g}", "--json")
    assert r.code == 0 and json.loads(r.stdout)["conflict"]["conflict"] is False
    assert cli("update", "bcg", *data).code == 0


def _quad(f, lo: float) -> float:
    return integrate.quad(f, lo, np.inf, epsabs=1e-14, epsrel=1e-12, limit=200)[0]


def test_numerical_predictives_state_an_accuracy_that_bounds_their_error() -> None:
    """Student-t prior and a normal estimate; log-normal rate prior and Poisson counts. The
    reference cdf is plain adaptive quadrature (scipy.integrate.quad) of the likelihood's cdf
    against the prior density, written here."""
    t = stats.t(4, 0.1, 0.3)
    prior = Prior.candidate(
        "identity", (Component("student_t", {"df": 4, "loc": 0.1, "scale": 0.3}),)
    )
    d = predictive(prior, planned("mean_difference", se=0.2))
    assert 0 < d.accuracy < 1e-3 and "accuracy" in d.method
    assert d.sd == pytest.approx(math.sqrt(0.3**2 * 4 / 2 + 0.2**2), rel=1e-9)
    for y in (-1.0, -0.3, 0.6, 1.5):
        ref = _quad(lambda th, y=y: t.pdf(th) * stats.norm.cdf((y - th) / 0.2), -np.inf)
        assert abs(d.below(y) - ref) <= d.accuracy
    lognormal = stats.lognorm(0.4, scale=0.8)
    prior = Prior.candidate("rate", (Component("lognormal", {"s": 0.4, "scale": 0.8}),))
    d = predictive(prior, planned("rate", exposure=30))
    assert 0 < d.accuracy < 1e-6
    for k in (5, 15, 24, 60):
        ref = _quad(lambda th, k=k: lognormal.pdf(th) * stats.poisson.cdf(k, 30 * th), 0.0)
        assert abs(d.below(k) - ref) <= max(d.accuracy, 1e-12)
    # closed forms are exact
    assert predictive(BETA_MIX, planned("proportion", n=40)).accuracy == 0.0


SIGNATURES = {"png": b"\x89PNG\r\n\x1a\n", "pdf": b"%PDF", "svg": b"<?xml"}


def _is_figure(path: Path) -> bool:
    data = path.read_bytes()
    return len(data) > 1000 and data.startswith(SIGNATURES[path.suffix.lstrip(".")])


def test_plots_write_a_file_of_each_format(cli, bcg_prior: Path, tmp_path: Path) -> None:
    db = ("--db", bcg_prior)
    sweep = ("sensitivity", "bcg", *NEW, "--over", "power", "--values", "0.5,1")
    event = ("--probability-below", "-0.4", "--decide", "0.5")
    runs = [
        ("predict", "bcg", "--se", "0.2", "--plot", tmp_path / "p.png"),
        ("update", "bcg", *NEW, "--plot", tmp_path / "u.svg"),
        (*sweep, *event, "--plot", tmp_path / "s.pdf"),
        (*sweep, "--plot", tmp_path / "mean.png"),  # mean and interval, no probability
    ]
    for args in runs:
        r = cli(*args, "--json", *db)
        assert r.code == 0, r.stderr
        json.loads(r.stdout)  # the figure's note goes to stderr
        assert _is_figure(args[-1]) and f"figure written to {args[-1]}" in r.stderr


def test_count_predictive_plot_draws_bars(tmp_path: Path) -> None:
    from registry.checks.predictive import Prediction
    from registry.report.checks_plots import predictive_plot

    study = planned("rate", exposure=30)
    prediction = Prediction("x@1", study, predictive(GAMMA_MIX, study), (9.0, 75.0))
    with matplotlib_svg_text():
        text = predictive_plot(tmp_path / "bars.svg", prediction).read_text()
    assert f"plausible range: P = {prediction.plausible:.3f}" in text
    assert "P(events = k)" in text


def matplotlib_svg_text():
    import matplotlib

    return matplotlib.rc_context({"svg.fonttype": "none"})


@pytest.mark.parametrize("name", ["missing/p.png", "p.gif", "."])
@pytest.mark.parametrize(
    "args",
    [
        ("predict", "bcg", "--se", "0.2"),
        ("update", "bcg", *NEW),
        ("sensitivity", "bcg", *NEW, "--over", "power", "--values", "1"),
    ],
)
def test_bad_plot_path_exits_2_with_one_line(cli, bcg_prior: Path, tmp_path: Path, args, name):
    path = tmp_path / name if name != "." else tmp_path
    r = cli(*args, "--plot", path, "--db", bcg_prior)
    assert r.code == 2 and r.stdout == ""
    (line,) = r.stderr.strip().splitlines()
    assert line.startswith("error: '--plot'")
