"""Time of predict, update and a 20-value power sweep on the invented demo registry.

Builds the demo in a temporary folder, then prints the median seconds of each call (after the
first, so start-up imports are left out), for the demo's control-rate prior with invented data.
    python bench/checks.py [--runs 3]
"""

from __future__ import annotations

import argparse
import statistics
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

from registry.checks.posterior import update_prior
from registry.checks.predictive import predict
from registry.checks.sensitivity import sensitivity
from registry.demo import run_demo
from registry.storage.ledger import Ledger

PRIOR = "falls-control-rate"
# INVENTED new data: 160 falls in 150 person-years
DATA = {"events": 160, "exposure": 150.0}


def median_s(call: Callable[[], object], runs: int) -> float:
    call()
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        call()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--runs", type=int, default=3)
    runs = parser.parse_args().runs
    folder = Path(tempfile.mkdtemp(prefix="priorledger-bench-"))
    ledger = Ledger.open(str(folder / "demo.db"))
    run_demo(ledger, folder)
    print(f"predict:  {median_s(lambda: predict(ledger, PRIOR, exposure=150.0), runs):.3f} s")
    print(f"update:   {median_s(lambda: update_prior(ledger, PRIOR, **DATA), runs):.3f} s")
    values = [round(0.05 * i, 2) for i in range(1, 21)]
    start = time.perf_counter()
    sensitivity(ledger, PRIOR, over="power", values=values, **DATA)
    print(f"power sweep, 20 values: {time.perf_counter() - start:.1f} s")


if __name__ == "__main__":
    main()
