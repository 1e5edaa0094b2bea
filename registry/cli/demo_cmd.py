"""`priorledger demo`: the whole job on the invented scenario, in one command."""

from __future__ import annotations

import tempfile
from pathlib import Path
from typing import Annotated

import typer

from registry.caution import CAUTION
from registry.cli.common import err, ledger, out, print_verbatim
from registry.cli.pool_cmd import render
from registry.cli.prior_cmds import show, trace_tree
from registry.cli.registry_cmds import entries_table


def demo(
    db: Annotated[
        str | None,
        typer.Option(
            "--db",
            metavar="URL_OR_PATH",
            help="Registry to build the demo in (default: a new temporary file).",
        ),
    ] = None,
    out_dir: Annotated[
        Path | None,
        typer.Option(
            "--out",
            metavar="FOLDER",
            help="Folder for the demo's figures (default: beside the registry).",
        ),
    ] = None,
) -> None:
    """Run the whole job on the invented demo scenario: load, pool, build, trace, emit.

    Example: priorledger demo
    """
    from registry.demo import DEFINITIONS, load_seed, seed_path
    from registry.emit import emit
    from registry.priors.definition import load_definition
    from registry.priors.selection import pool_entries
    from registry.priors.store import build_prior, trace_prior
    from registry.report.forest import forest_plot

    if db is None:
        db = str(Path(tempfile.mkdtemp(prefix="priorledger-demo-")) / "demo.db")
    elif "://" not in db:
        Path(db).parent.mkdir(parents=True, exist_ok=True)
    registry = ledger(db)
    folder = out_dir or (Path(db).parent if "://" not in db else Path.cwd())
    folder.mkdir(parents=True, exist_ok=True)
    out.rule("priorledger demo — INVENTED scenario")
    out.print(
        "A fictional network of community physiotherapy clinics plans a trial of a "
        "balance-training programme for older adults. Every study, number and DOI "
        "below is invented."
    )
    out.print(f"registry: {registry.url}")
    loaded = load_seed(registry)
    out.print(
        f"\n1. loaded {len(loaded.sources.added)} sources and "
        f"{len(loaded.sheet.added)} entries ({loaded.sheet.skipped} already present)"
    )
    out.print(entries_table(registry.entries()))

    effect = registry.entries(quantity="falls-programme-effect")
    pooled = pool_entries([e for e in effect if e.id != 3], method="reml")
    figure = forest_plot(
        folder / "falls-programme-effect-forest.png",
        [e.source for e in effect if e.id != 3],
        [e.y for e in effect if e.id != 3],
        [e.se for e in effect if e.id != 3],
        pooled,
        scale="log",
        title="Programme effect (INVENTED)",
        no_effect_line=True,
    )
    out.print("\n2. REML pooling of the programme's effect (one report per study):")
    render(pooled, "log")
    out.print(f"   forest plot: {figure}")

    out.print("\n3. the two priors, built from the definition files in seed_entries/:")
    built = []
    for name in DEFINITIONS:
        with err.status(f"building {name}"):
            stored = build_prior(registry, load_definition(seed_path(name)))
        built.append(stored)
        show(stored)
        out.print(trace_tree(trace_prior(registry, stored.prior.label), short=True))
    out.print("\n4. the priors as code (`priorledger emit NAME --to ...` for every language):")
    for stored in built:
        for language in ("stan", "pymc"):
            out.rule(f"{stored.prior.label} — {language}")
            print_verbatim(emit(stored.prior, language))
    err.print(CAUTION)
