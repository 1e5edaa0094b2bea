"""Operating characteristics of designs that borrow (`priorledger design`), against outside
references: scipy's exact binomial test and Poisson tails, the one-sided z-test, and an
independent seeded simulation written here. Priors come from published data: the control arms
of the BCG vaccine trials (Colditz et al. 1994, JAMA 271:698; counts as typed in
tests/test_frequentist.py)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from registry.checks.design import THRESHOLDS, DesignSpec, evaluate_design
from registry.errors import InputError
from registry.values.prior import Component, Prior
from tests.conftest import write_sheet
from tests.test_frequentist import BCG_COUNTS, write_bcg_bibliography
from tests.test_trust import BCG_CONTROL

FLAT = Prior(
    "flat", 1, "", "probability", (Component("beta", {"a": 1.0, "b": 1.0}),), measure="proportion"
)


def bcg_control_prior() -> Prior:
    """0.3 x Beta(1 + events, 1 + non-events) of each of the first three BCG control arms (a
    uniform prior updated by each arm) and 0.1 x Beta(1, 1)."""
    arms = [Component("beta", {"a": 1.0 + c, "b": 1.0 + d}, 0.3) for _, _, c, d in BCG_COUNTS[:3]]
    return Prior(
        "bcg-control",
        1,
        "",
        "probability",
        (*arms, Component("beta", {"a": 1.0, "b": 1.0}, 0.1)),
        measure="proportion",
    )


def first_success(n: int, p0: float, c: float) -> int:
    """The smallest x with P(p > p0 | x) > c under Beta(1, 1) (scipy's beta; monotone in x)."""
    return next(x for x in range(n + 1) if stats.beta(1 + x, 1 + n - x).sf(p0) > c)


@pytest.mark.parametrize(("n", "p0"), [(40, 0.2), (120, 0.35)])
def test_flat_one_arm_type1_is_the_exact_binomial_tests(n: int, p0: float) -> None:
    # common practice: the Bayesian rule rejects for x >= x*, so its size is that of the exact
    # binomial test with that rejection region, P(X >= x* | p0) (scipy binomtest's p-value)
    result = evaluate_design(FLAT, DesignSpec(control_n=n, reference=p0, truths=(p0, 0.5)))
    x_star = first_success(n, p0, 0.975)
    reference = stats.binomtest(x_star, n, p0, alternative="greater").pvalue
    assert result.scenarios[0].success == pytest.approx(reference, rel=1e-9)
    assert result.scenarios[1].success == pytest.approx(stats.binom.sf(x_star - 1, n, 0.5))


def test_calibrated_threshold_holds_alpha_and_the_next_grid_value_does_not() -> None:
    n, p0, alpha = 60, 0.3, 0.05
    result = evaluate_design(FLAT, DesignSpec(control_n=n, reference=p0, truths=(p0,), alpha=alpha))
    cal = result.calibrated_threshold
    assert cal is not None and cal.threshold is not None
    assert cal.next_threshold == THRESHOLDS[THRESHOLDS.index(cal.threshold) - 1]

    def size(c: float) -> float:  # exact binomial test with the rule's rejection region
        return stats.binomtest(first_success(n, p0, c), n, p0, alternative="greater").pvalue

    assert size(cal.threshold) <= alpha < size(cal.next_threshold)
    assert cal.type1 == pytest.approx(size(cal.threshold))


def test_one_arm_poisson_type1_is_the_exact_poisson_tail() -> None:
    # Gamma(1, scale 10) is nearly flat for a rate near 0.8; reject for x >= x*, size
    # P(X >= x* | lambda0 E) from scipy's Poisson (common practice)
    prior = Prior(
        "r", 1, "", "rate", (Component("gamma", {"a": 1.0, "scale": 10.0}),), measure="rate"
    )
    exposure, lam0 = 50.0, 0.8
    result = evaluate_design(
        prior, DesignSpec(control_exposure=exposure, reference=lam0, truths=(lam0, 1.2))
    )
    x_star = next(
        x for x in range(1000) if stats.gamma(1 + x, scale=1 / (0.1 + exposure)).sf(lam0) > 0.975
    )
    assert result.scenarios[0].success == pytest.approx(
        stats.poisson.sf(x_star - 1, lam0 * exposure), rel=1e-8
    )
    assert result.scenarios[1].success == pytest.approx(
        stats.poisson.sf(x_star - 1, 1.2 * exposure), rel=1e-8
    )
    assert result.method["truncation"]["largest_omitted"] < 1e-9


def test_normal_endpoint_with_a_vague_prior_is_the_one_sided_z_test() -> None:
    # textbook, common practice: with a flat prior, P(theta > 0 | y) > 1 - alpha iff
    # y / se > z_(1 - alpha); size alpha, power Phi(theta / se - z)
    prior = Prior(
        "v", 1, "", "identity", (Component("normal", {"loc": 0.0, "scale": 1e4}),), measure="smd"
    )
    se, alpha = 0.25, 0.025
    result = evaluate_design(prior, DesignSpec(se=se, threshold=1 - alpha, truths=(0.0, 0.5)))
    z = stats.norm.isf(alpha)
    assert result.scenarios[0].success == pytest.approx(alpha, abs=1e-6)
    assert result.scenarios[1].success == pytest.approx(stats.norm.cdf(0.5 / se - z), abs=1e-6)
    assert result.scenarios[0].rmse == pytest.approx(se, rel=1e-6)


def grid_probability(prior: Prior, xc: int, nc: int, xt: int, nt: int) -> float:
    """P(p_t > p_c | data): conjugate mixture posterior of the control arm (weights by the
    beta-binomial marginal), Beta(1 + xt, 1 + nt - xt) for the treatment, by the midpoint rule
    on 20,000 points of (0, 1): a direct implementation independent of the package's."""
    from scipy.special import betaln

    p = (np.arange(20_000) + 0.5) / 20_000
    comps = [(c.weight, c.params["a"], c.params["b"]) for c in prior.components]
    logw = np.array([np.log(w) + betaln(a + xc, b + nc - xc) - betaln(a, b) for w, a, b in comps])
    w = np.exp(logw - logw.max())
    w /= w.sum()
    density = sum(
        wj * stats.beta(a + xc, b + nc - xc).pdf(p) for wj, (_, a, b) in zip(w, comps, strict=True)
    )
    return float(np.sum(density * stats.beta(1 + xt, 1 + nt - xt).sf(p)) / 20_000)


def test_two_arm_exact_agrees_with_an_independent_seeded_simulation() -> None:
    prior, n, trials = bcg_control_prior(), 40, 4000
    truths, effects = (0.06, 0.2), (0.0, 0.15)
    result = evaluate_design(
        prior, DesignSpec(control_n=n, treatment_n=n, truths=truths, effects=effects)
    )
    rng = np.random.default_rng(20240611)
    cache: dict[tuple[int, int], float] = {}
    for s in result.scenarios:
        xc = rng.binomial(n, s.control, trials)
        xt = rng.binomial(n, s.treatment, trials)
        for pair in set(zip(xc.tolist(), xt.tolist(), strict=True)) - set(cache):
            cache[pair] = grid_probability(prior, pair[0], n, pair[1], n)
        prob = np.array([cache[pair] for pair in zip(xc.tolist(), xt.tolist(), strict=True)])
        rate = np.mean(prob > 0.975)
        mc_error = np.sqrt(max(rate * (1 - rate), 1 / trials) / trials)
        assert abs(s.success - rate) < 4 * mc_error, (s, rate, mc_error)
        mean = np.mean([(prior_mean(prior, a, n)) for a in xc])
        assert abs(s.bias - (mean - s.control)) < 4 * np.std(
            [prior_mean(prior, a, n) for a in xc]
        ) / np.sqrt(trials)


def prior_mean(prior: Prior, x: int, n: int) -> float:
    from scipy.special import betaln

    comps = [(c.weight, c.params["a"], c.params["b"]) for c in prior.components]
    logw = np.array([np.log(w) + betaln(a + x, b + n - x) - betaln(a, b) for w, a, b in comps])
    w = np.exp(logw - logw.max())
    return float(np.sum(w / w.sum() * [(a + x) / (a + b + n) for _, a, b in comps]))


def test_borrowing_trades_type1_error_under_drift_for_power_at_agreement() -> None:
    prior = bcg_control_prior()
    result = evaluate_design(
        prior,
        DesignSpec(control_n=100, treatment_n=100, truths=(0.03, 0.09, 0.2), effects=(0.0, 0.1)),
    )
    null = {s.control: s for s in result.scenarios if s.effect == 0}
    # the prior centres near 0.07: a true control rate far above it inflates the type I error
    assert null[0.2].success > null[0.2].success_without_borrowing
    assert result.assurance is not None and len(result.assurance) == 1


def test_bad_specifications_are_input_errors() -> None:
    prior = bcg_control_prior()
    for spec in (
        DesignSpec(control_n=0, treatment_n=10),
        DesignSpec(control_n=10, treatment_n=10, truths=(0.1, 1.2)),
        DesignSpec(control_exposure=10.0, treatment_exposure=10.0),
        DesignSpec(control_n=10),
        DesignSpec(control_n=10, treatment_n=10, better="up"),
    ):
        with pytest.raises(InputError):
            evaluate_design(prior, spec)


# ---- the command, on a prior built from the BCG control arms ------------------------------


@pytest.fixture
def stored(cli, tmp_path: Path) -> Path:
    db = tmp_path / "bcg.db"
    bib = write_bcg_bibliography(tmp_path / "bcg.bib")
    assert cli("sources", "import", bib, "--db", db).code == 0
    rows = [
        [f"bcg{i:02d}", "bcg-control-risk", "proportion", c, c + d]
        for i, (_, _, c, d) in enumerate(BCG_COUNTS)
    ]
    sheet = write_sheet(
        tmp_path / "bcg.csv", ["source", "quantity", "measure", "events", "total"], *rows
    )
    assert cli("import", sheet, "--db", db).code == 0
    definition = tmp_path / "bcg.toml"
    definition.write_text(BCG_CONTROL)  # the BCG control-arm definition of test_trust
    built = cli("build", definition, "--db", db)
    assert built.code == 0, built.stderr
    return db


def test_design_command_json_has_the_issue_keys(cli, stored: Path, tmp_path: Path) -> None:
    figure = tmp_path / "oc.png"
    done = cli(
        "design",
        "bcg-control",
        "--control-n",
        "60",
        "--treatment-n",
        "60",
        "--effect",
        "0",
        "--effect",
        "0.05",
        "--alpha",
        "0.025",
        "--plot",
        figure,
        "--json",
        "--db",
        stored,
    )
    assert done.code == 0, done.stderr
    doc = json.loads(done.stdout)
    assert {
        "prior",
        "design",
        "method",
        "threshold",
        "scenarios",
        "calibrated_threshold",
        "assurance",
    } <= set(doc)
    assert {"control", "treatment", "success", "success_without_borrowing", "bias", "rmse"} <= set(
        doc["scenarios"][0]
    )
    assert doc["method"]["name"] == "exact" and "qualified statistical review" in doc["caution"]
    assert figure.stat().st_size > 0
    text = cli("design", "bcg-control", "--control-n", "60", "--treatment-n", "60", "--db", stored)
    assert text.code == 0 and "treatment prior" in text.stdout and "pre-specified" in text.stdout


@pytest.mark.parametrize(
    ("args", "field"),
    [
        (("--control-n", "0", "--treatment-n", "50"), "--control-n"),
        (("--control-exposure", "-3", "--treatment-exposure", "5"), "--control-exposure"),
        (("--control-n", "50", "--treatment-n", "50", "--truth", "0.1:1.5:5"), "--truth"),
        (("--se", "0.2"), "--se"),
    ],
)
def test_bad_input_exits_2_with_one_line(
    cli, stored: Path, args: tuple[str, ...], field: str
) -> None:
    done = cli("design", "bcg-control", *args, "--db", stored)
    assert done.code == 2 and done.stdout == ""
    assert len(done.stderr.strip().splitlines()) == 1 and field in done.stderr, done.stderr


def test_a_stale_prior_warns(cli, stored: Path) -> None:
    cli("sources", "retract", "bcg01", "--reason", "journal notice", "--db", stored)
    done = cli("design", "bcg-control", "--control-n", "40", "--treatment-n", "40", "--db", stored)
    assert done.code == 0 and "warning" in done.stderr and "retracted" in done.stderr
