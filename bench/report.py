"""Time and size of a reviewer's report of each invented demo prior, and of its rendering in
headless Chromium when `chromium` is on the PATH.

Prints, per prior, the seconds `render_report` takes (most of it the verifying rebuild), the
report's size in bytes, and the seconds Chromium takes to screenshot it.
    python bench/report.py
"""

from __future__ import annotations

import shutil
import subprocess
import tempfile
import time
from pathlib import Path

from registry.demo import run_demo
from registry.report.html import write_report
from registry.storage.ledger import Ledger

BROWSER = (
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--window-size=1200,3000",
)  # fmt: skip


def main() -> None:
    folder = Path(tempfile.mkdtemp())
    ledger = Ledger.open(str(folder / "demo.db"))
    for stored in run_demo(ledger, folder).built:
        path = folder / f"{stored.prior.name}.html"
        start = time.perf_counter()
        written = write_report(ledger, stored.prior.label, path)
        seconds = time.perf_counter() - start
        line = f"{stored.prior.label}: report {seconds:.1f} s, {written.size} bytes"
        if shutil.which("chromium"):
            start = time.perf_counter()
            subprocess.run(
                ["chromium", *BROWSER, f"--user-data-dir={folder / 'profile'}",
                 f"--screenshot={folder / 'shot.png'}", path.as_uri()],
                check=True, capture_output=True,
            )  # fmt: skip
            line += f"; chromium screenshot {time.perf_counter() - start:.1f} s"
        print(line)


if __name__ == "__main__":
    main()
