"""Time of `ess_all` for a few priors and of `ess_of_density` on a grid.

Prints the median of several runs of each, in milliseconds. The priors are invented.
    python bench/ess.py [--runs 7]
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable

import numpy as np
from scipy import special, stats

from registry.priors.ess import CanonicalDensity, ess_all, ess_of_density
from registry.values.prior import Component, Prior


def median_ms(call: Callable[[], object], runs: int) -> float:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        call()
        times.append((time.perf_counter() - start) * 1000)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--runs", type=int, default=7)
    runs = parser.parse_args().runs
    priors = {
        "beta, robust 20%": Prior.candidate(
            "probability",
            (
                Component("beta", {"a": 30.0, "b": 70.0}, 0.8),
                Component("beta", {"a": 0.3, "b": 0.7}, 0.2),
            ),
        ),
        "gamma, 3 components": Prior.candidate(
            "rate",
            tuple(
                Component("gamma", {"a": a, "scale": s}, w)
                for a, s, w in ((1.5, 0.2, 0.3), (4.0, 0.1, 0.4), (20.0, 0.02, 0.3))
            ),
        ),
        "normal on logit, 4 components": Prior.candidate(
            "logit",
            tuple(Component("normal", {"loc": m, "scale": 0.3}, 0.25) for m in (-2, -1, 0, 1)),
        ),
    }
    for name, prior in priors.items():
        print(f"ess_all, {name}: {median_ms(lambda p=prior: ess_all(p), runs):.1f} ms")
    beta = stats.beta(3.0, 7.0)
    phi = np.linspace(-25, 20, 20_001)
    log_p = beta.logpdf(special.expit(phi)) - np.logaddexp(0, phi) - np.logaddexp(0, -phi)
    density = CanonicalDensity.from_grid(
        phi, log_p, support="unit", mean=beta.mean(), variance=beta.var()
    )
    ms = median_ms(lambda: ess_of_density(density, "probability"), runs)
    print(f"ess_of_density, beta on a 20001-point grid: {ms:.1f} ms")


if __name__ == "__main__":
    main()
