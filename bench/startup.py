"""Start-up (issue 13, goal 3): `priorledger --help` beside `python -c "import typer, rich"`
(goal: at most 1.3 times), `--version`, a data command on a small registry, and what
SQLAlchemy's and Alembic's imports cost; whether a data command on an up-to-date registry
imports Alembic (goal: no). Medians of several runs, ratios from the same run. Run with the
project installed:
    python bench/startup.py [--runs 15]
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

# Opens an up-to-date registry as a data command does and says whether Alembic was imported.
ALEMBIC_PROBE = (
    "import sys; from registry.storage.ledger import Ledger; Ledger.open(sys.argv[1]); "
    "print('alembic' in sys.modules)"
)


def medians_ms(commands: dict[str, list[str]], runs: int) -> dict[str, float]:
    """Median wall time of each command; the commands take turns, round after round, so that
    a machine shared with other work slows each of them alike."""
    times: dict[str, list[float]] = {label: [] for label in commands}
    for _ in range(runs):
        for label, command in commands.items():
            start = time.perf_counter()
            subprocess.run(command, capture_output=True, check=True)
            times[label].append((time.perf_counter() - start) * 1000)
    return {label: statistics.median(values) for label, values in times.items()}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__)
    parser.add_argument("--runs", type=int, default=15)
    runs = parser.parse_args().runs
    command = shutil.which("priorledger")
    if command is None:
        sys.exit("install the project first: python -m pip install -e .")
    db = str(Path(tempfile.mkdtemp()) / "small.db")
    subprocess.run([command, "init", "--db", db], capture_output=True, check=True)
    python = sys.executable
    rows = {
        "python -c pass": [python, "-c", "pass"],
        'python -c "import typer, rich"': [python, "-c", "import typer, rich"],
        "priorledger --help": [command, "--help"],
        "priorledger --version": [command, "--version"],
        "priorledger entries --json": [command, "entries", "--json", "--db", db],
        "import sqlalchemy": [python, "-c", "import sqlalchemy"],
        "import sqlalchemy.orm": [python, "-c", "import sqlalchemy.orm"],
        "import alembic (migrations)": [python, "-c", "import alembic.command"],
    }
    times = medians_ms(rows, runs)
    print(f"{'command':<34}{'median ms':>10}")
    for label, ms in times.items():
        print(f"{label:<34}{ms:>10.1f}")
    ratio = times["priorledger --help"] / times['python -c "import typer, rich"']
    print(f"--help over import typer, rich: {ratio:.2f} (goal <= 1.3; median of {runs} runs)")
    probe = subprocess.run([python, "-c", ALEMBIC_PROBE, db], capture_output=True, text=True)
    print(f"data command on an up-to-date registry imports Alembic: {probe.stdout.strip()}")


if __name__ == "__main__":
    main()
