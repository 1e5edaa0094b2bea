"""Emitters: parameters per language, mixtures, headers, injection, JSON round trip.

The emitted arguments are read back through each language's documented definition of its
distributions (written out below, independently of the emitters, with the reference it is
taken from) and compared with scipy.stats, the project's reference distribution. The
numbers in the test priors are arbitrary values chosen for the test, not data.
"""

from __future__ import annotations

import ast
import math
import re
from collections.abc import Callable

import pytest
from scipy import stats

from registry.emit import LANGUAGES, emit, load_json
from registry.errors import InputError
from registry.values.prior import Component, EntryUse, Prior

CODE_LANGUAGES = ("stan", "jags", "pymc", "numpyro", "brms")
COMMENT = {"stan": "//", "jags": "#", "pymc": "#", "numpyro": "#", "brms": "#"}


def single(family: str, params: dict[str, float], scale: str, measure: str = "") -> Prior:
    return Prior(
        f"test-{family}",
        1,
        "sha256:" + "0" * 64,
        scale,
        (Component(family, params),),
        quantity=f"test {family}",
        measure=measure,
    )


def mixture(
    family: str,
    first: dict[str, float],
    second: dict[str, float],
    scale: str,
    weights: tuple[float, float] = (0.3, 0.7),
) -> Prior:
    return Prior(
        f"test-{family}-mix",
        2,
        "sha256:" + "1" * 64,
        scale,
        (Component(family, first, weights[0]), Component(family, second, weights[1])),
        quantity=f"test {family} mix",
    )


# One prior per family on a scale where that family is used, and a two-component mixture of
# each family with overlapping components (so that MCMC in the client tests mixes).
SINGLES: dict[str, Prior] = {
    "normal": single("normal", {"loc": -0.4, "scale": 0.5}, "log", "rate_ratio"),
    "student_t": single("student_t", {"df": 5.0, "loc": 0.2, "scale": 0.3}, "identity", "smd"),
    "lognormal": single("lognormal", {"s": 0.4, "scale": 1.8}, "rate"),
    "beta": single("beta", {"a": 3.0, "b": 7.0}, "probability"),
    "gamma": single("gamma", {"a": 2.5, "scale": 0.4}, "rate"),
}
MIXTURES: dict[str, Prior] = {
    "normal": mixture("normal", {"loc": -0.5, "scale": 0.4}, {"loc": 0.5, "scale": 0.6}, "logit"),
    "student_t": mixture(
        "student_t",
        {"df": 4.0, "loc": -0.5, "scale": 0.4},
        {"df": 8.0, "loc": 0.5, "scale": 0.6},
        "identity",
    ),
    "lognormal": mixture("lognormal", {"s": 0.3, "scale": 1.0}, {"s": 0.5, "scale": 2.0}, "rate"),
    "beta": mixture("beta", {"a": 2.0, "b": 8.0}, {"a": 6.0, "b": 4.0}, "probability"),
    "gamma": mixture("gamma", {"a": 2.0, "scale": 0.5}, {"a": 5.0, "scale": 0.4}, "rate"),
}
# The worked example: weights 0.3 and 0.7, means -1 and 1, sds 0.1 and 0.5. By the
# laws of total expectation and variance (common practice): mean 0.3(-1) + 0.7(1) = 0.4;
# variance 0.3(0.01 + 1.96) + 0.7(0.25 + 0.36) = 1.018.
WORKED = mixture("normal", {"loc": -1.0, "scale": 0.1}, {"loc": 1.0, "scale": 0.5}, "log")
ALL = {**{f"{k}": v for k, v in SINGLES.items()}, **{f"{k}_mix": v for k, v in MIXTURES.items()}}


# Each language's definition of its distributions as scipy.stats objects. Sources (recalled
# from memory): Stan Functions Reference (also brms, which passes Stan's functions through);
# JAGS User Manual 4.3, ch. 9 (precision parameterisations); PyMC and NumPyro API docs.
SEMANTICS: dict[str, dict[str, Callable[..., object]]] = {
    "stan": {
        "normal": lambda mu, sigma: stats.norm(mu, sigma),
        "student_t": lambda nu, mu, sigma: stats.t(nu, mu, sigma),
        "lognormal": lambda mu, sigma: stats.lognorm(sigma, scale=math.exp(mu)),
        "beta": lambda a, b: stats.beta(a, b),
        "gamma": lambda alpha, rate: stats.gamma(alpha, scale=1 / rate),
    },
    "jags": {
        "dnorm": lambda mu, tau: stats.norm(mu, tau**-0.5),
        "dt": lambda mu, tau, k: stats.t(k, mu, tau**-0.5),
        "dlnorm": lambda mu, tau: stats.lognorm(tau**-0.5, scale=math.exp(mu)),
        "dbeta": lambda a, b: stats.beta(a, b),
        "dgamma": lambda r, rate: stats.gamma(r, scale=1 / rate),
    },
    "pymc": {
        "Normal": lambda mu, sigma: stats.norm(mu, sigma),
        "StudentT": lambda nu, mu, sigma: stats.t(nu, mu, sigma),
        "LogNormal": lambda mu, sigma: stats.lognorm(sigma, scale=math.exp(mu)),
        "Beta": lambda alpha, beta: stats.beta(alpha, beta),
        "Gamma": lambda alpha, beta: stats.gamma(alpha, scale=1 / beta),
    },
    "numpyro": {
        "Normal": lambda loc, scale: stats.norm(loc, scale),
        "StudentT": lambda df, loc, scale: stats.t(df, loc, scale),
        "LogNormal": lambda loc, scale: stats.lognorm(scale, scale=math.exp(loc)),
        "Beta": lambda concentration1, concentration0: stats.beta(concentration1, concentration0),
        "Gamma": lambda concentration, rate: stats.gamma(concentration, scale=1 / rate),
    },
}
SEMANTICS["brms"] = SEMANTICS["stan"]

_NUMBER = r"-?[0-9.]+(?:e[-+]?[0-9]+)?"


def _numbers(text: str) -> list[float]:
    return [float(x) for x in re.findall(_NUMBER, text)]


def code_lines(text: str, language: str) -> list[str]:
    return [ln for ln in text.splitlines() if ln.strip() and not ln.startswith(COMMENT[language])]


def _python_calls(text: str, language: str) -> list[tuple[float, object]]:
    """(weight, scipy distribution) read from a PyMC or NumPyro snippet by Python's parser."""
    tree = ast.parse(text)
    calls = [n for n in ast.walk(tree) if isinstance(n, ast.Call)]

    def dist(call: ast.Call) -> object:
        func = call.func
        if isinstance(func, ast.Attribute) and func.attr == "dist":  # pm.Normal.dist(...)
            func = func.value
        assert isinstance(func, ast.Attribute)
        kwargs = {k.arg: ast.literal_eval(k.value) for k in call.keywords}
        return SEMANTICS[language][func.attr](**kwargs)

    names = set(SEMANTICS[language])
    comps = [
        c
        for c in calls
        if isinstance(c.func, ast.Attribute)
        and (
            c.func.attr in names
            or (c.func.attr == "dist" and getattr(c.func.value, "attr", "") in names)
        )
    ]
    weights: list[float] = [1.0]
    for c in calls:
        for k in c.keywords:
            if k.arg in ("w", "probs"):
                node = k.value.args[0] if isinstance(k.value, ast.Call) else k.value
                weights = ast.literal_eval(node)
    return list(zip(weights, [dist(c) for c in comps], strict=True))


def read_back(text: str, language: str) -> list[tuple[float, object]]:
    """The mixture an emitted snippet states, as (weight, scipy distribution) pairs."""
    if language in ("pymc", "numpyro"):
        return _python_calls(text, language)
    body = "\n".join(code_lines(text, language))
    if language == "stan":
        mix = re.findall(r"log\((" + _NUMBER + r")\) \+ (\w+)_lpdf\(\w+ \| ([^)]*)\)", body)
        if mix:
            return [(float(w), SEMANTICS["stan"][f](*_numbers(a))) for w, f, a in mix]
        f, a = re.search(r"\w+ ~ (\w+)\(([^)]*)\);", body).groups()
        return [(1.0, SEMANTICS["stan"][f](*_numbers(a)))]
    if language == "brms":
        f, a = re.search(r"prior\((\w+)\(([^)]*)\), class = b, coef = \w+\)", body).groups()
        return [(1.0, SEMANTICS["brms"][f](*_numbers(a)))]
    weights = [float(w) for w in re.findall(r"_weight\[\d+\] <- (" + _NUMBER + ")", body)]
    draws = re.findall(r"~ (d(?:norm|t|lnorm|beta|gamma))\(([^)]*)\)", body)
    return list(
        zip(weights or [1.0], [SEMANTICS["jags"][f](*_numbers(a)) for f, a in draws], strict=True)
    )


def _languages_for(prior: Prior) -> list[str]:
    # brms-style statements refuse mixtures and bounded supports (tested below).
    ok_brms = not prior.is_mixture and prior.components[0].support == "real"
    return [lang for lang in CODE_LANGUAGES if lang != "brms" or ok_brms]


CASES = [
    (key, lang)
    for key, prior in {**ALL, "worked": WORKED}.items()
    for lang in _languages_for(prior)
]


@pytest.mark.parametrize(("key", "language"), CASES)
def test_emitted_distribution_is_the_prior(key: str, language: str) -> None:
    prior = {**ALL, "worked": WORKED}[key]
    parts = read_back(emit(prior, language), language)
    assert len(parts) == len(prior.components)
    assert sum(w for w, _ in parts) == pytest.approx(1.0, abs=1e-12)
    for q in (0.01, 0.1, 0.5, 0.9, 0.99):
        x = prior.ppf(q)
        assert sum(w * d.cdf(x) for w, d in parts) == pytest.approx(q, abs=1e-9)


def test_sd_becomes_stan_sd_and_jags_precision() -> None:
    prior = single("normal", {"loc": 0.25, "scale": 0.5}, "identity")
    assert "x ~ normal(0.25, 0.5);" in emit(prior, "stan", param="x")
    assert "x ~ dnorm(0.25, 4.0)" in emit(prior, "jags", param="x")
    assert 'x = pm.Normal("x", mu=0.25, sigma=0.5)' in emit(prior, "pymc", param="x")
    assert "dist.Normal(loc=0.25, scale=0.5)" in emit(prior, "numpyro", param="x")
    assert "prior(normal(0.25, 0.5), class = b, coef = x)" in emit(prior, "brms", param="x")


def test_gamma_is_shape_rate_in_every_language() -> None:
    # scipy's gamma(a, scale=0.25) has rate 4 (scipy.stats.gamma documentation).
    prior = single("gamma", {"a": 3.0, "scale": 0.25}, "rate")
    assert "x ~ gamma(3.0, 4.0);" in emit(prior, "stan", param="x")
    assert "x ~ dgamma(3.0, 4.0)" in emit(prior, "jags", param="x")
    assert 'pm.Gamma("x", alpha=3.0, beta=4.0)' in emit(prior, "pymc", param="x")
    assert "dist.Gamma(concentration=3.0, rate=4.0)" in emit(prior, "numpyro", param="x")


@pytest.mark.parametrize("language", ["stan", "jags", "pymc", "numpyro"])
def test_worked_mixture_mean_and_variance(language: str) -> None:
    parts = read_back(emit(WORKED, language), language)
    mean = sum(w * d.mean() for w, d in parts)
    var = sum(w * (d.var() + (d.mean() - mean) ** 2) for w, d in parts)
    assert mean == pytest.approx(0.4, abs=1e-12)
    assert var == pytest.approx(1.018, abs=1e-12)


@pytest.mark.parametrize("key", [*MIXTURES, "worked"])
@pytest.mark.parametrize("language", ["stan", "jags", "pymc", "numpyro"])
def test_mixture_is_one_statement_on_the_parameter(key: str, language: str) -> None:
    prior = MIXTURES.get(key, WORKED)
    body = "\n".join(code_lines(emit(prior, language, param="theta"), language))
    sampling = {
        "stan": r"^\s*theta\s*~",
        "jags": r"^\s*theta\s*~",
        "pymc": r"pm\.\w+\(\s*\"theta\"",
        "numpyro": r"numpyro\.sample\(\s*\"theta\"",
    }[language]
    found = len(re.findall(sampling, body, flags=re.MULTILINE))
    if language == "stan":
        assert found == 0
        assert len(re.findall(r"target \+= log_sum_exp\(", body)) == 1
    elif language == "jags":
        assert found == 0
        assert re.findall(r"^theta <- theta_draw\[theta_component\]$", body, re.MULTILINE)
        assert len(re.findall(r"^theta_component ~ dcat\(", body, re.MULTILINE)) == 1
    else:
        assert found == 1


def test_brms_refuses_a_mixture_and_says_what_to_do() -> None:
    with pytest.raises(InputError) as err:
        emit(WORKED, "brms")
    assert "mixture" in err.value.message and "--to stan" in err.value.message


@pytest.mark.parametrize("family", ["lognormal", "beta", "gamma"])
def test_brms_refuses_a_bounded_family(family: str) -> None:
    with pytest.raises(InputError) as err:
        emit(SINGLES[family], "brms")
    assert "--to stan" in err.value.message


# A small grammar for brms' prior() statement as emitted: prior(<stan call>, class = b,
# coef = <R name>). Real brms checks it in tests/test_emit_clients.py where R is installed.
_BRMS = re.compile(
    r"prior\((normal|student_t)\(" + _NUMBER + r"(, " + _NUMBER + r"){1,2}\), "
    r"class = b, coef = [A-Za-z][A-Za-z0-9_]*\)"
)


@pytest.mark.parametrize("family", ["normal", "student_t"])
def test_brms_statement_follows_the_grammar(family: str) -> None:
    lines = code_lines(emit(SINGLES[family], "brms"), "brms")
    assert len(lines) == 1 and _BRMS.fullmatch(lines[0])


@pytest.mark.parametrize(("key", "language"), CASES)
def test_header_says_what_and_where_from(key: str, language: str) -> None:
    prior = {**ALL, "worked": WORKED}[key]
    text = emit(prior, language)
    header = " ".join(
        ln[len(COMMENT[language]) :] for ln in text.splitlines() if ln.startswith(COMMENT[language])
    )
    for needle in (
        prior.name,
        f"version {prior.version}",
        prior.digest,
        f"analysis scale: {prior.scale}",
        f"priorledger trace {prior.label}",
        "pre-specified",
        "operating characteristics",
        "qualified statistical",
    ):
        assert needle in header


def test_log_scale_parameter_is_named_and_transformed() -> None:
    prior = SINGLES["normal"]  # log rate ratio
    stan = emit(prior, "stan")
    assert "real log_test_normal;" in stan
    assert "real test_normal = exp(log_test_normal);" in stan
    assert "log rate ratio" in stan
    assert "test_normal <- exp(log_test_normal)" in emit(prior, "jags")
    logit = emit(MIXTURES["normal"], "pymc")
    assert 'pm.Deterministic("test_normal_mix", pm.math.invlogit(logit_test_normal_mix))' in logit


BAD_NAMES = [
    'a"b',
    "a'b",
    "a\nb",
    "a\rb",
    "x*/",
    "/*x",
    "x//",
    "a b",
    "a;b",
    "1abc",
    "",
    "_x",
    "é",
    "x" * 65,
    "a-b",
    "a.b",
    "x\u2028y",
]
RESERVED = {
    "stan": ["for", "target", "lower", "int", "real", "x__", "log_sum_exp"],
    "jags": ["model", "data", "var", "in", "for"],
    "pymc": ["for", "lambda", "class", "pm", "match"],
    "numpyro": ["def", "import", "None", "dist", "numpyro"],
    "brms": ["if", "TRUE", "NULL", "function", "coef"],
}


@pytest.mark.parametrize("language", CODE_LANGUAGES)
@pytest.mark.parametrize("name", BAD_NAMES)
def test_unsafe_names_are_refused(language: str, name: str) -> None:
    with pytest.raises(InputError) as err:
        emit(SINGLES["normal"], language, param=name)
    assert err.value.field == "param"


@pytest.mark.parametrize(
    ("language", "name"), [(lang, n) for lang, names in RESERVED.items() for n in names]
)
def test_reserved_words_are_refused(language: str, name: str) -> None:
    with pytest.raises(InputError) as err:
        emit(SINGLES["normal"], language, param=name)
    assert "reserved" in err.value.message or "__" in err.value.message


HOSTILE = (
    "x */ } model { y ~ normal(0, 1); /* \n\r\u2028\u2029\u0085 import os; os.system('x')"
    "\n# -*- coding: utf-7 -*-\x00\x1b[2J \u202e 'quote\" //; ${a}`b` \\"
)


@pytest.mark.parametrize(("key", "language"), CASES)
def test_free_text_cannot_leave_a_comment(key: str, language: str) -> None:
    clean = {**ALL, "worked": WORKED}[key]
    doc = clean.to_dict()
    doc.update(name=HOSTILE, parameter=HOSTILE, digest=HOSTILE)
    hostile = Prior.from_dict(doc)
    text = emit(hostile, language, param="theta")
    # The code is exactly the code written for the same numbers with harmless text.
    assert code_lines(text, language) == code_lines(emit(clean, language, param="theta"), language)
    for line in text.splitlines():
        assert line.isascii() and line.isprintable()
        if line.startswith(COMMENT[language]):
            assert "*/" not in line and "/*" not in line
            assert not re.search(r"coding[:=]", line)
    if language in ("pymc", "numpyro"):
        ast.parse(text)  # Python's own parser: still one valid program


def test_python_snippets_parse() -> None:
    for key, language in CASES:
        if language in ("pymc", "numpyro"):
            ast.parse(emit({**ALL, "worked": WORKED}[key], language))


def test_default_name_comes_from_the_quantity_and_scale() -> None:
    prior = Prior(
        "falls",
        1,
        "d",
        "logit",
        (Component("normal", {"loc": 0, "scale": 1}),),
        quantity="falls-rate-control-12m",
    )
    assert "real logit_falls_rate_control_12m;" in emit(prior, "stan")
    prior = Prior("9 lives", 1, "d", "identity", (Component("normal", {"loc": 0, "scale": 1}),))
    assert "real theta_9_lives;" in emit(prior, "stan")


def test_unknown_language_and_json_param() -> None:
    with pytest.raises(InputError) as err:
        emit(WORKED, "winbugs")
    assert err.value.field == "to"
    with pytest.raises(InputError) as err:
        emit(WORKED, "json", param="x")
    assert err.value.field == "param"
    assert set(LANGUAGES) == {"stan", "jags", "pymc", "numpyro", "brms", "json"}


def _rich_prior() -> Prior:
    return Prior(
        "falls-rr",
        4,
        "sha256:" + "ab" * 32,
        "log",
        (
            Component("normal", {"loc": -0.1 / 3, "scale": 0.3}, 0.2),
            Component("student_t", {"df": 3.0, "loc": 0.7, "scale": 1e-5}, 0.8),
        ),
        parameter="log rate ratio of falls",
        quantity="falls-rr",
        measure="rate_ratio",
        ess={"curvature_at_mean": 12.345678901234567, "method": "x"},
        entries=(EntryUse(3, 2, 0.25), EntryUse(9, 1, 0.75)),
    )


@pytest.mark.parametrize("prior", [*ALL.values(), WORKED, _rich_prior()], ids=str)
def test_json_round_trip_is_identical(prior: Prior) -> None:
    text = emit(prior, "json")
    back = load_json(text)
    assert back == prior
    assert back.digest == prior.digest
    assert emit(back, "json") == text


def test_json_is_described_and_versioned() -> None:
    import json

    doc = json.loads(emit(_rich_prior(), "json"))
    assert doc["format"] == "priorledger.prior" and doc["format_version"] == 1
    for key in ("name", "version", "digest", "scale", "components", "ess", "entries"):
        assert key in doc
    q = doc["summary"]["quantiles"]
    ref = stats.norm(-0.1 / 3, 0.3)
    assert doc["components"][0] == {
        "weight": 0.2,
        "family": "normal",
        "loc": -0.1 / 3,
        "scale": 0.3,
    }
    assert ref.cdf(q["0.5"]) * 0.2 + 0.8 * stats.t(3, 0.7, 1e-5).cdf(q["0.5"]) == pytest.approx(
        0.5, abs=1e-9
    )


@pytest.mark.parametrize(
    "text",
    [
        "{",
        "[]",
        '{"format": "other"}',
        '{"format": "priorledger.prior", "format_version": 99}',
        '{"format": "priorledger.prior", "format_version": 1}',
    ],
)
def test_json_refuses_what_it_cannot_read(text: str) -> None:
    with pytest.raises(InputError):
        load_json(text)
