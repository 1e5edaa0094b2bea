"""Cold start-up time of `priorledger --help` beside a bare `python -c pass`.

Prints the median of several runs of each, in milliseconds. Run with the project installed:
    python bench/startup.py [--runs 15]
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import subprocess
import sys
import time


def median_ms(command: list[str], runs: int) -> float:
    times = []
    for _ in range(runs):
        start = time.perf_counter()
        subprocess.run(command, capture_output=True, check=True)
        times.append((time.perf_counter() - start) * 1000)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--runs", type=int, default=15)
    runs = parser.parse_args().runs
    command = shutil.which("priorledger")
    if command is None:
        sys.exit("install the project first: python -m pip install .")
    bare = median_ms([sys.executable, "-c", "pass"], runs)
    help_ = median_ms([command, "--help"], runs)
    print(f"{'command':<28}{'median ms':>10}")
    print(f"{'python -c pass':<28}{bare:>10.1f}")
    print(f"{'priorledger --help':<28}{help_:>10.1f}")
    print(f"{'difference':<28}{help_ - bare:>10.1f}   (median of {runs} runs each)")


if __name__ == "__main__":
    main()
