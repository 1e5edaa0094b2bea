"""The invented demo: the whole job on the definitions and files in `seed_entries/`.

Everything the demo loads is invented (see seed_entries/README.md). `run_demo` is what
`priorledger demo` prints; a notebook user can call it too.
"""

from __future__ import annotations

from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Any

from registry.errors import InputError
from registry.storage.ledger import EntryView, ImportReport, Ledger, SourceImportReport
from registry.storage.views import StoredPrior

SHEET = "falls-sheet.csv"
BIBLIOGRAPHY = "falls-sources.bib"
DEFINITIONS = ("falls-control-rate.toml", "falls-programme-effect.toml")
# the definition whose selection (one report per study) the demo pools and plots
POOLED = "falls-programme-effect.toml"
# the checks the demo ends with, on its control-rate prior, with INVENTED new data: a planned
# control arm followed for 150 person-years; then 130 falls observed in those 150 person-years
CHECKED = "falls-control-rate"
PLANNED_EXPOSURE = 150.0
NEW_DATA = {"events": 130.0, "exposure": 150.0}
# a short power sweep (each value rebuilds the prior); the full default grid is
# `priorledger sensitivity falls-control-rate --events 130 --exposure 150 --over power`
SWEEP_VALUES = (0.25, 0.5, 1.0)
SWEEP_ABOVE = 1.0  # falls per person-year


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


@dataclass(frozen=True)
class DemoChecks:
    """The checks of the control-rate prior with INVENTED new data: the predictive of the
    planned control arm, the update with the new data, and a short power sweep."""

    prediction: Any
    update: Any
    sweep: Any


def run_checks(ledger: Ledger) -> DemoChecks:
    """predict, update and a power sweep of the demo's control-rate prior (nothing stored)."""
    from registry.checks.posterior import update_prior
    from registry.checks.predictive import predict
    from registry.checks.sensitivity import sensitivity

    return DemoChecks(
        prediction=predict(ledger, CHECKED, exposure=PLANNED_EXPOSURE),
        update=update_prior(ledger, CHECKED, **NEW_DATA),
        sweep=sensitivity(
            ledger,
            CHECKED,
            over="power",
            values=SWEEP_VALUES,
            above=SWEEP_ABOVE,
            **NEW_DATA,
        ),
    )


@dataclass(frozen=True)
class DemoRun:
    """What the demo did: the load, the entries, one pooling with its forest plot, the built
    priors and their traces."""

    load: DemoLoad
    entries: tuple[EntryView, ...]
    pooled_entries: tuple[EntryView, ...]
    pooled: Any
    forest: Path
    built: tuple[StoredPrior, ...]
    traces: tuple[dict[str, Any], ...]
    checks: DemoChecks


def _demo_keys() -> set[str]:
    from registry.evidence.bibliography import read_bibliography

    return {r.key for r in read_bibliography(seed_path(BIBLIOGRAPHY))}


def check_only_demo(ledger: Ledger) -> None:
    """Refuse a registry that holds anything but the demo, so that invented priors never land
    among a group's real ones."""
    from registry.priors.definition import load_definition

    foreign = sorted({s.key for s in ledger.sources()} - _demo_keys())
    names = {load_definition(seed_path(n)).name for n in DEFINITIONS}
    foreign += sorted({p.prior.name for p in ledger.priors()} - names)
    if foreign:
        raise InputError(
            f"this registry holds more than the invented demo ({', '.join(foreign[:3])}"
            f"{', ...' if len(foreign) > 3 else ''}); run the demo in a new registry",
            field="--db",
        )


def _new_file(path: Path) -> Path:
    """`path`, or the first free `stem-N.suffix` beside it: never a file already there."""
    candidate, n = path, 1
    while candidate.exists():
        n += 1
        candidate = path.with_name(f"{path.stem}-{n}{path.suffix}")
    return candidate


def run_demo(ledger: Ledger, folder: Path) -> DemoRun:
    """Load the demo files, pool the programme's effect as its definition selects it, draw the
    forest plot into `folder`, build both priors and trace them, then check the control-rate
    prior with invented new data."""
    from registry.priors.definition import load_definition
    from registry.priors.selection import pool_entries
    from registry.priors.store import build_prior, select_entries, trace_prior
    from registry.report.forest import entries_forest_plot

    check_only_demo(ledger)
    load = load_seed(ledger)
    definitions = {name: load_definition(seed_path(name)) for name in DEFINITIONS}
    chosen = select_entries(ledger, definitions[POOLED])
    pooled = pool_entries(chosen, method="reml")
    figure = entries_forest_plot(
        _new_file(folder / f"{definitions[POOLED].name}-forest.png"),
        chosen,
        pooled,
        title="Programme effect (INVENTED)",
    )
    built = tuple(build_prior(ledger, d) for d in definitions.values())
    return DemoRun(
        load=load,
        entries=tuple(ledger.entries(include_retracted=True)),
        pooled_entries=tuple(chosen),
        pooled=pooled,
        forest=figure,
        built=built,
        traces=tuple(trace_prior(ledger, s.prior.label) for s in built),
        checks=run_checks(ledger),
    )
