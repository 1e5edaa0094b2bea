"""`priorledger demo`: the whole job on the invented scenario, in one command."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from registry.caution import CAUTION
from registry.cli.check_cmds import render_prediction, render_sensitivity, render_update
from registry.cli.common import err, ledger, out, output_folder, print_verbatim
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
    from registry.demo import run_demo
    from registry.emit import emit

    if db is None:
        import tempfile

        db = str(Path(tempfile.mkdtemp(prefix="priorledger-demo-")) / "demo.db")
    elif "://" not in db:
        output_folder(Path(db).parent, "--db")
    folder = output_folder(out_dir or (Path(db).parent if "://" not in db else Path.cwd()), "--out")
    registry = ledger(db)
    with err.status(
        "running the demo: loading, pooling, building two priors, checking one (about a minute)"
    ):
        run = run_demo(registry, folder)
    out.rule("priorledger demo — INVENTED scenario")
    out.print(
        "A fictional network of community physiotherapy clinics plans a trial of a "
        "balance-training programme for older adults. Every study, number and DOI "
        "below is invented."
    )
    out.print(f"registry: {registry.url}")
    out.print(
        f"\n1. loaded {len(run.load.sources.added)} sources and "
        f"{len(run.load.sheet.added)} entries ({run.load.sheet.skipped} already present)"
    )
    out.print(entries_table(list(run.entries)))
    out.print(
        "\n2. REML pooling of the programme's effect, one report per study as its "
        "definition selects:"
    )
    render(run.pooled, run.pooled_entries[0].scale)
    out.print(f"   forest plot: {run.forest}")
    out.print("\n3. the two priors, built from the definition files in seed_entries/:")
    for stored, trace in zip(run.built, run.traces, strict=True):
        for warning in stored.result.warnings:
            err.print(f"warning: {warning}")
        show(stored)
        out.print(trace_tree(trace, short=True))
    out.print("\n4. the priors as code (`priorledger emit NAME --to ...` for every language):")
    for stored in run.built:
        for language in ("stan", "pymc"):
            out.rule(f"{stored.prior.label} — {language}")
            print_verbatim(emit(stored.prior, language))
    render_checks(run.checks)
    err.print(CAUTION)


def render_checks(checks: Any) -> None:
    """Step 5: the demo's checks of its control-rate prior, with their INVENTED data."""
    from registry.demo import CHECKED, NEW_DATA, PLANNED_EXPOSURE, SWEEP_VALUES

    events, exposure = NEW_DATA["events"], NEW_DATA["exposure"]
    out.print()
    out.rule(f"checks of {CHECKED} — INVENTED data")
    out.print(
        f"5. checks of {CHECKED} before use (nothing is stored). INVENTED data: a planned "
        f"control arm followed for {PLANNED_EXPOSURE:g} person-years; then {events:g} falls "
        f"observed in {exposure:g} person-years."
    )
    out.rule(f"priorledger predict {CHECKED} --exposure {PLANNED_EXPOSURE:g}")
    render_prediction(checks.prediction.to_dict())
    data = f"--events {events:g} --exposure {exposure:g}"
    out.rule(f"priorledger update {CHECKED} {data}")
    render_update(checks.update.to_dict())
    values = ",".join(f"{v:g}" for v in SWEEP_VALUES)
    out.rule(f"priorledger sensitivity {CHECKED} {data} --over power --values {values}")
    render_sensitivity(checks.sweep.to_dict())
    out.print(
        f"   a short sweep (each value rebuilds the prior); the full default grid: "
        f"priorledger sensitivity {CHECKED} {data} --over power"
    )
