"""Emitted code run by the real modelling languages (the `clients` extra, JAGS and R/brms).

Each check draws from the emitted prior and compares sample quantiles with the prior's own
quantiles (scipy). Monte Carlo tolerance: the asymptotic standard error of a sample
p-quantile, sqrt(p (1 - p) / n_eff) / f(x_p), where f is the prior density at the true
quantile x_p (Serfling 1980, *Approximation Theorems of Mathematical Statistics*, 2.3.3,
recalled) and n_eff is the number of draws for independent draws, or ArviZ's quantile
effective sample size for MCMC (rank-normalised quantile ESS, as ArviZ computes it); a check fails
beyond 4 standard errors. Every sampler is seeded.

A skipped test means the tool is missing: install with `pip install -e .[clients]` and run
`.ci/clients.sh` (JAGS, R's brms from Debian).
"""

from __future__ import annotations

import math
import re
import shutil
import subprocess
import textwrap
from pathlib import Path

import numpy as np
import pytest
from test_emit import ALL, SEMANTICS, SINGLES, WORKED, code_lines

from registry.emit import emit
from registry.values.prior import Prior

pytestmark = pytest.mark.clients

QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)
Z = 4.0
PRIORS: dict[str, Prior] = {**ALL, "worked": WORKED}


def assert_quantiles(
    prior: Prior, draws: np.ndarray, ess: dict[float, float] | None = None
) -> None:
    draws = np.asarray(draws, dtype=float).ravel()
    for q in QUANTILES:
        x = prior.ppf(q)
        n_eff = ess[q] if ess else draws.size
        se = math.sqrt(q * (1 - q) / n_eff) / math.exp(float(prior.logpdf(x)))
        got = float(np.quantile(draws, q))
        assert abs(got - x) <= Z * se, f"{prior.name} q={q}: {got} vs {x} (se {se:.3g})"


def quantile_ess(chains: np.ndarray) -> dict[float, float]:
    """ArviZ's effective sample size of each quantile, for draws shaped (chain, draw)."""
    az = pytest.importorskip("arviz")
    return {
        q: float(az.ess(np.asarray(chains, dtype=float), method="quantile", prob=q))
        for q in QUANTILES
    }


def blocks(program: str) -> dict[str, list[str]]:
    """The statements inside each top-level block of an emitted Stan program."""
    found: dict[str, list[str]] = {}
    current = None
    for line in program.splitlines():
        if line.startswith("//"):
            continue
        if line.endswith("{") and not line.startswith(" "):
            current = line[:-1].strip()
            found[current] = []
        elif line == "}":
            current = None
        elif current is not None:
            found[current].append(line)
    return found


# --- Stan ------------------------------------------------------------------------------


def _stanc() -> Path:
    httpstan = pytest.importorskip("httpstan")
    return Path(httpstan.__file__).parent / "stanc"


def test_every_emitted_stan_program_compiles(tmp_path: Path) -> None:
    stanc = _stanc()
    programs = {key: emit(p, "stan") for key, p in PRIORS.items()}
    # Distribution names stay usable as parameter names (see registry.emit.names).
    programs["named_beta"] = emit(SINGLES["beta"], "stan", param="beta")
    programs["named_normal"] = emit(SINGLES["normal"], "stan", param="normal")
    for key, program in programs.items():
        source = tmp_path / f"{key}.stan"
        source.write_text(program)
        done = subprocess.run(
            [str(stanc), str(source), "--o", str(tmp_path / f"{key}.hpp")],
            capture_output=True,
            text=True,
            check=False,
        )
        assert done.returncode == 0, f"{key}: {done.stderr}"


def test_stan_sampling_reproduces_the_quantiles() -> None:
    stan = pytest.importorskip("stan")
    # One program, built from the lines a user would copy out of each emitted program, so
    # that only one C++ compilation is needed.
    parts: dict[str, list[str]] = {"parameters": [], "model": [], "generated quantities": []}
    for key, prior in ALL.items():
        for block, lines in blocks(emit(prior, "stan", param=f"p_{key}")).items():
            parts[block] += lines
    program = "\n".join(
        f"{block} {{\n" + "\n".join(lines) + "\n}" for block, lines in parts.items() if lines
    )
    chains, draws = 4, 2500
    model = stan.build(program, random_seed=20240611)
    fit = model.sample(num_chains=chains, num_samples=draws, num_warmup=1000)
    for key, prior in ALL.items():
        # pystan interleaves the chains: draw d of chain c is at d * chains + c.
        x = np.asarray(fit[f"p_{key}"]).reshape(-1)
        by_chain = x.reshape(draws, chains).T
        assert_quantiles(prior, x, quantile_ess(by_chain))


# --- PyMC and NumPyro (independent draws from the prior) -----------------------------------

N_DRAWS = 40_000


@pytest.mark.parametrize("key", list(PRIORS))
def test_pymc_draws_reproduce_the_quantiles(key: str) -> None:
    pm = pytest.importorskip("pymc")
    prior = PRIORS[key]
    namespace = {"pm": pm}
    with pm.Model():
        exec(emit(prior, "pymc", param="theta"), namespace)
        draws = pm.draw(namespace["theta"], draws=N_DRAWS, random_seed=20240611)
    assert_quantiles(prior, draws)


@pytest.mark.parametrize("key", list(PRIORS))
def test_numpyro_draws_reproduce_the_quantiles(key: str) -> None:
    numpyro = pytest.importorskip("numpyro")
    import jax
    import numpyro.distributions as dist
    from numpyro.infer import Predictive

    prior = PRIORS[key]
    namespace = {"numpyro": numpyro, "dist": dist}
    source = "def model():\n" + textwrap.indent(emit(prior, "numpyro", param="theta"), "    ")
    exec(source, namespace)
    draws = Predictive(namespace["model"], num_samples=N_DRAWS)(jax.random.PRNGKey(20240611))
    assert_quantiles(prior, np.asarray(draws["theta"]))


# --- JAGS (the command-line program from Debian's jags package) ---------------------------


def test_jags_reproduces_the_quantiles(tmp_path: Path) -> None:
    jags = shutil.which("jags")
    if jags is None:
        pytest.skip("JAGS is not installed (run .ci/clients.sh)")
    names = {key: f"p_{key}" for key in PRIORS}
    body = "\n".join(emit(prior, "jags", param=names[key]) for key, prior in PRIORS.items())
    (tmp_path / "model.bug").write_text("model {\n" + body + "}\n")
    (tmp_path / "inits.R").write_text(
        '".RNG.name" <- "base::Mersenne-Twister"\n".RNG.seed" <- 20240611\n'
    )
    iterations = 20_000
    commands = [
        'model in "model.bug"',
        "compile, nchains(1)",
        'parameters in "inits.R"',
        "initialize",
        "update 1000",
        *(f"monitor {n}" for n in names.values()),
        f"update {iterations}",
        "coda *, stem(out)",
        "exit",
    ]
    (tmp_path / "run.cmd").write_text("\n".join(commands) + "\n")
    done = subprocess.run(
        [jags, "run.cmd"], cwd=tmp_path, capture_output=True, text=True, check=False, timeout=300
    )
    assert done.returncode == 0 and "error" not in done.stdout.lower(), done.stdout
    values = np.loadtxt(tmp_path / "outchain1.txt")[:, 1]
    index = {}
    for line in (tmp_path / "outindex.txt").read_text().splitlines():
        name, start, end = line.split()
        index[name] = values[int(start) - 1 : int(end)]
    for key, prior in PRIORS.items():
        x = index[names[key]]
        assert x.size == iterations
        assert_quantiles(prior, x, quantile_ess(x[None, :]))


# --- brms (R, from Debian's r-cran-brms) ---------------------------------------------------


def test_brms_reads_the_statements_as_the_prior(tmp_path: Path) -> None:
    rscript = shutil.which("Rscript")
    if rscript is None:
        pytest.skip("R is not installed (run .ci/clients.sh)")
    keys = [k for k, p in SINGLES.items() if p.components[0].support == "real"]
    script = [
        "suppressPackageStartupMessages(library(brms))",
        "d <- data.frame(y = 0, theta = 0, other = 0)",
    ]
    for key in keys:
        (statement,) = code_lines(emit(SINGLES[key], "brms", param="theta"), "brms")
        script += [
            f'cat("== {key}\\n")',
            f"cat(make_stancode(y ~ 0 + theta + other, data = d, prior = {statement}))",
        ]
    (tmp_path / "check.R").write_text("\n".join(script) + "\n")
    done = subprocess.run(
        [rscript, str(tmp_path / "check.R")],
        capture_output=True,
        text=True,
        check=False,
        timeout=300,
    )
    if "there is no package called" in done.stderr:
        pytest.skip("R's brms is not installed (run .ci/clients.sh)")
    assert done.returncode == 0, done.stderr
    sections = dict(re.findall(r"== (\w+)\n(.*?)(?=\n== |\Z)", done.stdout, re.DOTALL))
    for key in keys:
        family, args = re.search(
            r"lprior \+= (\w+)_lpdf\(b\[1\] \| ([^)]*)\)", sections[key]
        ).groups()
        translated = SEMANTICS["stan"][family](*[float(a) for a in args.split(",")])
        prior = SINGLES[key]
        for q in QUANTILES:
            assert translated.cdf(prior.ppf(q)) == pytest.approx(q, abs=1e-9)
