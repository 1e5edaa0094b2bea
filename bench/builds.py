"""Builds (issue 13, goal 4): each demo prior from scratch (goal: under 1 s), an unchanged
rebuild, `verify` over one build (goal: at most 1), the binding ESS cap against the old path
that refits at every solver step, and the whole `priorledger demo` (goal: under 5 s).
Run with the project installed:
    python bench/builds.py [--old-cap]
(--old-cap also times the refit-every-step cap solve, which takes minutes.)
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def seconds(work) -> tuple[float, object]:  # type: ignore[no-untyped-def]
    start = time.perf_counter()
    value = work()
    return time.perf_counter() - start, value


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--old-cap", action="store_true")
    args = parser.parse_args()

    import registry.priors.build as build
    from registry.demo import DEFINITIONS, load_seed, seed_path
    from registry.priors.definition import load_definition
    from registry.priors.ess import power_for_ess_cap
    from registry.priors.store import build_prior, select_entries, verify_prior
    from registry.storage.ledger import Ledger

    folder = Path(tempfile.mkdtemp())
    ledger = Ledger.open(str(folder / "demo.db"))
    load_seed(ledger)
    print(f"{'step':<48}{'seconds':>9}{'ratio':>9}")
    for name in DEFINITIONS:
        definition = load_definition(seed_path(name))
        took, stored = seconds(lambda d=definition: build_prior(ledger, d))
        print(f"{'build ' + stored.prior.label:<48}{took:>9.2f}{'':>9}   (goal < 1 s)")
        again, _ = seconds(lambda d=definition: build_prior(ledger, d))
        print(f"{'  unchanged rebuild':<48}{again:>9.3f}{again / took:>9.3f}")
        check, _ = seconds(lambda s=stored: verify_prior(ledger, s.prior.label))
        print(f"{'  verify':<48}{check:>9.2f}{check / took:>9.2f}   (goal <= 1)")
        if args.old_cap and definition["discount.ess_cap"] is not None:
            entries = select_entries(ledger, definition)
            ratings = [build.rate_entry(e, definition) for e in entries]
            row = build.check_selection(entries)
            old, _ = seconds(
                lambda d=definition, e=entries, r=ratings, w=row: power_for_ess_cap(
                    lambda a: build._at_power(d, e, r, a, w, False).ess,
                    d["discount.ess_cap"],
                    method=build.ESS_METHOD,
                )
            )
            print(f"{'  old cap solve (a build at every step)':<48}{old:>9.2f}{took / old:>9.3f}")
    command = shutil.which("priorledger")
    if command is None:
        sys.exit("install the project first: python -m pip install -e .")
    demo_db = folder / "whole-demo" / "demo.db"
    took, _ = seconds(
        lambda: subprocess.run(
            [command, "demo", "--db", str(demo_db)], capture_output=True, check=True
        )
    )
    print(f"{'priorledger demo (whole)':<48}{took:>9.2f}{'':>9}   (goal < 5 s)")


if __name__ == "__main__":
    main()
