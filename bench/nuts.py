"""Exact binomial Bayesian pooling beside NUTS (NumPyro) at equal predictive-quantile accuracy.

Model, as `fit_binomial` fits it with these priors: y_i ~ Bin(n_i, expit(theta_i)),
theta_i ~ N(mu, tau²), tau ~ half-normal(1), mu flat (improper uniform). Data: the invented
binomial data of `bench/synthesis.py` (fixed seed; n_i ~ U{50..399}, logit p_i ~
N(-1.5, 0.4²)), k = 100 and k = 1000.

Ours: median wall time of `fit_binomial` over a few runs (predictive quantiles and density
grid included); its quantiles carry the stated accuracy QUANTILE_ACCURACY x max(1, sd).

NUTS (when NumPyro imports): non-centred theta_i = mu + tau z_i, z_i ~ N(0, 1); mu an
ImproperUniform on the real line; NumPyro's default NUTS (target acceptance 0.8, tree depth
up to 10); float64; 4 chains run in sequence on the CPU (chain_method="sequential"), warm-up
then sampling. Compile time is what JAX reports for tracing, lowering and XLA compilation
(its `jax.monitoring` duration events), subtracted from the wall time of each phase.

Monte Carlo error of the 2.5/50/97.5% predictive quantiles, two estimators from the draws:
- draws: the quantiles of theta_new = mu + tau z, one fresh z per draw;
- mixture: the quantiles of the mixture mean_s N(mu_s, tau_s²) (Rao-Blackwellised; smaller
  error, so the kinder to NUTS).
Each one's standard error by batch means: 25 batches per chain, 100 in all (common practice).
NUTS is not run to our accuracy (at 1e-5 it would take days): the time it would need is
extrapolated as t_warmup + t_sampling x (se / target)², since the error falls as
1/sqrt(draws). Targets: our stated accuracy, and a looser 1e-3 for comparison. Agreement:
our quantiles against the mixture estimates, in units of their standard error.

Usage: python bench/nuts.py [--quick]
"""

from __future__ import annotations

import argparse
import collections
import importlib.metadata
import math
import time
from collections.abc import Callable

import numpy as np
from scipy import optimize, special
from synthesis import LEVELS, simulate, timed

from registry.synthesis import QUANTILE_ACCURACY, fit_binomial

TAU_PRIOR_SCALE = 1.0
CHAINS = 4
BATCHES_PER_CHAIN = 25


def mixture_quantiles(mu: np.ndarray, tau: np.ndarray) -> np.ndarray:
    """Quantiles at LEVELS of the equal-weight mixture of N(mu_s, tau_s²), by Brent's method."""
    lo, hi = float(np.min(mu - 12 * tau)), float(np.max(mu + 12 * tau))
    return np.array(
        [
            optimize.brentq(
                lambda x, p=p: special.ndtr((x - mu) / tau).mean() - p, lo, hi, xtol=1e-12
            )
            for p in LEVELS
        ]
    )


def batch_means(
    estimate: Callable[..., np.ndarray], *series: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """The estimate from all draws of `series` (each chains x draws), and its batch-means
    standard error over BATCHES_PER_CHAIN batches of each chain."""
    parts = np.array(
        [
            estimate(*batch)
            for chain in zip(*series, strict=True)
            for batch in zip(*(np.array_split(s, BATCHES_PER_CHAIN) for s in chain), strict=True)
        ]
    )
    se = parts.std(axis=0, ddof=1) / math.sqrt(len(parts))
    return estimate(*(s.ravel() for s in series)), se


class CompileClock:
    """Seconds JAX spends tracing, lowering and compiling, from its monitoring events."""

    def __init__(self) -> None:
        import jax

        self.seconds: collections.Counter[str] = collections.Counter()
        jax.monitoring.register_event_duration_secs_listener(self._listen)

    def _listen(self, event: str, duration: float, **_: object) -> None:
        if event.startswith("/jax/core/compile/"):
            self.seconds["compile"] += duration

    def take(self) -> float:
        return self.seconds.pop("compile", 0.0)


def run_nuts(events: np.ndarray, totals: np.ndarray, warmup: int, samples: int, seed: int):
    """Warm-up and sampling phases: wall and compile seconds of each, and the draws."""
    import jax
    import jax.numpy as jnp
    import numpyro
    import numpyro.distributions as dist
    from numpyro.distributions import constraints
    from numpyro.infer import MCMC, NUTS

    jax.config.update("jax_enable_x64", True)
    clock = CompileClock()

    def model(y, n):
        mu = numpyro.sample("mu", dist.ImproperUniform(constraints.real, (), ()))
        tau = numpyro.sample("tau", dist.HalfNormal(TAU_PRIOR_SCALE))
        with numpyro.plate("study", y.shape[0]):
            z = numpyro.sample("z", dist.Normal(0.0, 1.0))
            numpyro.sample("y", dist.Binomial(n, logits=mu + tau * z), obs=y)

    y, n = jnp.asarray(events, dtype=jnp.float64), jnp.asarray(totals, dtype=jnp.float64)
    mcmc = MCMC(
        NUTS(model),
        num_warmup=warmup,
        num_samples=samples,
        num_chains=CHAINS,
        chain_method="sequential",
        progress_bar=False,
    )
    clock.take()
    start = time.perf_counter()
    mcmc.warmup(jax.random.PRNGKey(seed), y, n)
    warm_wall, warm_compile = time.perf_counter() - start, clock.take()
    start = time.perf_counter()
    mcmc.run(mcmc.post_warmup_state.rng_key, y, n, extra_fields=("diverging",))
    draws = {k: np.asarray(v) for k, v in mcmc.get_samples(group_by_chain=True).items()}
    sample_wall, sample_compile = time.perf_counter() - start, clock.take()
    divergent = int(np.asarray(mcmc.get_extra_fields()["diverging"]).sum())
    return {
        "compile": warm_compile + sample_compile,
        "warmup": warm_wall - warm_compile,
        "sampling": sample_wall - sample_compile,
        "mu": draws["mu"],
        "tau": draws["tau"],
        "divergent": divergent,
    }


def nuts_versions() -> str | None:
    """'numpyro X, jax Y', or None (with the reason printed) when NumPyro cannot be imported."""
    try:
        import numpyro  # noqa: F401
    except ImportError as exc:
        print(f"NUTS side skipped: NumPyro cannot be imported ({exc}); install the clients extra.")
        return None
    return ", ".join(f"{p} {importlib.metadata.version(p)}" for p in ("numpyro", "jax", "jaxlib"))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="k = 100 only, shorter chains")
    args = parser.parse_args()
    ks = (100,) if args.quick else (100, 1000)
    warmup, samples = (500, 1000) if args.quick else (1000, 2500)
    print("Exact binomial model, simulated (invented) data, fixed seed; times in seconds.")
    versions = nuts_versions()
    if versions:
        print(
            f"NUTS: {versions}; {CHAINS} chains in sequence on CPU, {warmup} warm-up and "
            f"{samples} draws each, float64; time to target extrapolated, not run."
        )
    rng = np.random.default_rng(11)
    rows, agreement, ratios = [], [], []
    for k in ks:
        data = simulate(k)
        ours_t, fit = timed(lambda d=data: fit_binomial(d["events"], d["n"], "half-normal:1"), 3)
        ours_q = np.array([fit.predictive.quantiles[f"{q:g}"] for q in LEVELS])
        target = QUANTILE_ACCURACY * max(1.0, fit.predictive.sd)
        if not versions:
            rows.append(f"{k:>5} {ours_t:>8.3f}   NUTS skipped")
            continue
        nuts = run_nuts(data["events"], data["n"], warmup, samples, seed=k)
        mu, tau = nuts["mu"], nuts["tau"]
        z = rng.standard_normal(mu.shape)
        _, se_draws = batch_means(lambda x: np.quantile(x, LEVELS), mu + tau * z)
        q_mix, se_mix = batch_means(mixture_quantiles, mu, tau)
        rows.append(
            f"{k:>5} {ours_t:>8.3f} {nuts['compile']:>9.2f} {nuts['warmup']:>8.2f} "
            f"{nuts['sampling']:>9.2f} {mu.size:>7} {nuts['divergent']:>5} "
            f"{se_draws.max():>9.2e} {se_mix.max():>9.2e} {target:>9.2e}"
        )
        for p, a, b, s in zip(LEVELS, ours_q, q_mix, se_mix, strict=True):
            agreement.append(
                f"{k:>5} {p:>6g} {a:>10.5f} {b:>10.5f} {a - b:>+10.5f} {(a - b) / s:>+7.2f}"
            )
        for name, tgt in (("ours", target), ("1e-3", 1e-3)):
            for estimator, se in (("mixture", se_mix.max()), ("draws", se_draws.max())):
                run = nuts["warmup"] + nuts["sampling"] * (se / tgt) ** 2
                ratios.append(
                    f"{k:>5} {name:>6} {estimator:>8} {run:>12.4g} {run / ours_t:>12.4g} "
                    f"{(run + nuts['compile']) / ours_t:>12.4g}"
                )
    print(
        f"\n{'k':>5} {'ours':>8} {'compile':>9} {'warm-up':>8} {'sampling':>9} {'draws':>7} "
        f"{'div':>5} {'se draws':>9} {'se mix':>9} {'target':>9}"
    )
    print("\n".join(rows))
    if not versions:
        return
    print("\nAgreement (ours - NUTS mixture estimate, and in its standard errors):")
    print(f"{'k':>5} {'level':>6} {'ours':>10} {'NUTS':>10} {'diff':>10} {'/se':>7}")
    print("\n".join(agreement))
    print("\nNUTS time to the target (warm-up + sampling x (se/target)², no compile) and ratios:")
    print(f"{'k':>5} {'target':>6} {'se of':>8} {'NUTS s':>12} {'ratio':>12} {'w/ compile':>12}")
    print("\n".join(ratios))


if __name__ == "__main__":
    main()
