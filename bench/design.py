"""Time of an exact two-arm binary design (200 per arm, 41 true control values) against a naive
simulation of 10,000 trials per scenario, each trial's posterior probability estimated from
4,000 posterior draws. The naive simulation is timed on one scenario with --trials trials and
scaled to 10,000 trials x 41 scenarios (it grows linearly in both). The prior is invented.
    python bench/design.py [--runs 3] [--trials 500]
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np

from registry.checks.design import DesignSpec, evaluate_design
from registry.values.prior import Component, Prior

PRIOR = Prior(
    "invented-control",
    1,
    "",
    "probability",
    (
        Component("beta", {"a": 30.0, "b": 90.0}, 0.8),
        Component("beta", {"a": 1.0, "b": 1.0}, 0.2),
    ),
    measure="proportion",
)
SPEC = DesignSpec(
    control_n=200, treatment_n=200, truths=tuple(np.linspace(0.1, 0.4, 41)), effects=(0.0,)
)


def naive_scenario(trials: int, seed: int = 1) -> float:
    """Success rate of one scenario (control 0.25, no effect) by brute force."""
    from scipy.special import betaln

    rng = np.random.default_rng(seed)
    hits = 0
    for _ in range(trials):
        xc, xt = rng.binomial(200, 0.25), rng.binomial(200, 0.25)
        logw = np.array([np.log(0.8), np.log(0.2)])  # conjugate mixture weights, then draws
        logw += [betaln(30 + xc, 290 - xc) - betaln(30, 90), betaln(1 + xc, 201 - xc)]
        w = np.exp(logw - logw.max())
        pick = rng.random(4000) < w[0] / w.sum()
        pc = np.where(pick, rng.beta(30 + xc, 290 - xc, 4000), rng.beta(1 + xc, 201 - xc, 4000))
        pt = rng.beta(1 + xt, 201 - xt, 4000)
        hits += np.mean(pt > pc) > 0.975
    return hits / trials


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--runs", type=int, default=3)
    parser.add_argument("--trials", type=int, default=500)
    args = parser.parse_args()
    evaluate_design(PRIOR, SPEC)  # imports and caches out of the timing
    times = []
    for _ in range(args.runs):
        start = time.perf_counter()
        evaluate_design(PRIOR, SPEC)
        times.append(time.perf_counter() - start)
    print(f"exact, 201 x 201 outcome pairs, 41 scenarios: {statistics.median(times):.2f} s")
    start = time.perf_counter()
    naive_scenario(args.trials)
    per_trial = (time.perf_counter() - start) / args.trials
    print(
        f"naive simulation, 10,000 trials x 41 scenarios: {per_trial * 10_000 * 41:.0f} s "
        f"(scaled from {args.trials} trials of one scenario)"
    )


if __name__ == "__main__":
    main()
