"""Builds (issue 13, goal 4): each demo prior from scratch (goal: under 1 s), an unchanged
rebuild, `verify` over one build (goal: at most 1), the binding ESS cap against the old path
that refits at every solver step, and the whole `priorledger demo` (goal: under 5 s).
Run with the project installed:
    python bench/builds.py [--old-cap]
(--old-cap also times the refit-every-step cap solve, which takes minutes.)

Each step shows its wall-clock seconds and the CPU seconds of this process (of the demo's
process for the whole demo): on a shared machine the wall clock also counts the time other
work holds the cores, the CPU time does not. The numerical libraries are imported first, on a
line of their own, so that the first build does not count them (the whole demo does).
"""

from __future__ import annotations

import argparse
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def seconds(work) -> tuple[float, float, object]:  # type: ignore[no-untyped-def]
    wall, cpu = time.perf_counter(), time.process_time()
    value = work()
    return time.perf_counter() - wall, time.process_time() - cpu, value


def line(step: str, wall: float, cpu: float, ratio: str = "", goal: str = "") -> None:
    print(f"{step:<44}{wall:>8.2f}{cpu:>8.2f}{ratio:>8}{goal}")


def child_cpu() -> float:
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--old-cap", action="store_true")
    args = parser.parse_args()

    print(f"{'step':<44}{'wall s':>8}{'cpu s':>8}{'ratio':>8}")
    wall, cpu, _ = seconds(
        lambda: [__import__(m) for m in ("registry.synthesis", "registry.priors.ess")]
    )
    line("import numpy, scipy and the synthesis modules", wall, cpu)

    import registry.priors.build as build
    from registry.demo import DEFINITIONS, load_seed, seed_path
    from registry.priors.definition import load_definition
    from registry.priors.ess import power_for_ess_cap
    from registry.priors.store import build_prior, select_entries, verify_prior
    from registry.storage.ledger import Ledger

    folder = Path(tempfile.mkdtemp())
    ledger = Ledger.open(str(folder / "demo.db"))
    load_seed(ledger)
    for name in DEFINITIONS:
        definition = load_definition(seed_path(name))
        took, cpu, stored = seconds(lambda d=definition: build_prior(ledger, d))
        line(f"build {stored.prior.label}", took, cpu, "", "   (goal < 1 s)")
        again, cpu, _ = seconds(lambda d=definition: build_prior(ledger, d))
        line("  unchanged rebuild", again, cpu, f"{again / took:.3f}")
        check, cpu, _ = seconds(lambda s=stored: verify_prior(ledger, s.prior.label))
        line("  verify", check, cpu, f"{check / took:.2f}", "   (goal <= 1)")
        if args.old_cap and definition["discount.ess_cap"] is not None:
            entries = select_entries(ledger, definition)
            ratings = [build.rate_entry(e, definition) for e in entries]
            row = build.check_selection(entries)
            old, cpu, _ = seconds(
                lambda d=definition, e=entries, r=ratings, w=row: power_for_ess_cap(
                    lambda a: build._at_power(d, e, r, a, w, False).ess,
                    d["discount.ess_cap"],
                    method=build.ESS_METHOD,
                )
            )
            line("  old cap solve (a build at every step)", old, cpu, f"{took / old:.3f}")
    command = shutil.which("priorledger")
    if command is None:
        sys.exit("install the project first: python -m pip install -e .")
    demo_db = folder / "whole-demo" / "demo.db"
    before = child_cpu()
    took, _, _ = seconds(
        lambda: subprocess.run(
            [command, "demo", "--db", str(demo_db)], capture_output=True, check=True
        )
    )
    line("priorledger demo (whole)", took, child_cpu() - before, "", "   (goal < 5 s)")


if __name__ == "__main__":
    main()
