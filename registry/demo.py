"""The invented demo: a registry built from `seed_entries/`, as ordinary import files.

Everything the demo loads is invented (see seed_entries/README.md).
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib import resources
from pathlib import Path

from registry.storage.ledger import ImportReport, Ledger, SourceImportReport

SHEET = "falls-sheet.csv"
BIBLIOGRAPHY = "falls-sources.bib"
DEFINITIONS = ("falls-control-rate.toml", "falls-programme-effect.toml")


def seed_path(name: str) -> Path:
    return Path(str(resources.files("registry.seed_entries").joinpath(name)))


@dataclass(frozen=True)
class DemoLoad:
    sources: SourceImportReport
    sheet: ImportReport


def load_seed(ledger: Ledger) -> DemoLoad:
    """Import the demo bibliography, then the demo extraction sheet."""
    sources = ledger.import_sources(seed_path(BIBLIOGRAPHY))
    sheet = ledger.import_sheet(seed_path(SHEET))
    return DemoLoad(sources, sheet)
