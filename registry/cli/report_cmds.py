"""Commands for a reviewer: report (one self-contained HTML file) and diff (two versions)."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from registry.cli.check_cmds import Estimate, Events, Exposure, N, Se
from registry.cli.common import DbOption, JsonOption, err, ledger, out, print_json, reading

if TYPE_CHECKING:
    from registry.priors.diff import PriorDiff, Summary


def _summary_line(s: Summary) -> str:
    ess = ", ".join(f"{m} {'none' if v is None else format(v, '.1f')}" for m, v in s.ess.items())
    return (
        f"{s.components} components on the {s.scale} scale; mean {s.mean:.4g}, sd {s.sd:.4g}, "
        f"95% interval [{s.interval_95[0]:.4g}, {s.interval_95[1]:.4g}]; ESS {ess} {s.ess_unit}"
    )


def diff_lines(d: PriorDiff) -> list[str]:
    """The diff as lines of text, one change a line."""
    lines = [f"{d.before} -> {d.after}"]
    if d.identical:
        lines.append(
            f"identical: the same digest {d.digests[0][:16]} (definition, entry revisions and "
            "ratings)"
        )
    lines += [f"definition: {c.text()}" for c in d.definition]
    lines += [f"entry {i} added (revision {r})" for i, r in d.added]
    lines += [f"entry {i} removed (was revision {r})" for i, r in d.removed]
    for r in d.revised:
        why = "; ".join(f"revision {n}: {reason}" for n, reason in r.reasons)
        lines.append(f"entry {r.id} revised: revision {r.before} -> {r.after} ({why})")
    lines += [f"entry {c.id}: {c.change.text()}" for c in d.ratings]
    lines += [f"entry {c.id}: discount {c.change.text()}" for c in d.discounts]
    lines += [f"entry {c.id}: {c.change.text()}" for c in d.shares]
    if d.software[0] != d.software[1]:
        lines.append(f"software: priorledger {d.software[0]} -> {d.software[1]}")
    lines.append(f"before: {_summary_line(d.summaries[0])}")
    lines.append(f"after:  {_summary_line(d.summaries[1])}")
    return lines


def diff(
    before: Annotated[str, typer.Argument(metavar="NAME@A", help="The earlier version.")],
    after: Annotated[str, typer.Argument(metavar="NAME@B", help="The later version.")],
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Say what changed between two versions of a prior: settings, entries, ratings, summaries.

    Example: priorledger diff falls-programme-effect@1 falls-programme-effect@2
    """
    from registry.priors.diff import diff_priors

    with reading(db) as reads:
        result = diff_priors(reads, before, after)
    if as_json:
        print_json(result.to_dict())
        return
    for line in diff_lines(result):
        out.print(line)


def report(
    label: Annotated[
        str, typer.Argument(metavar="NAME[@N]", help="A prior, latest version by default.")
    ],
    out_file: Annotated[
        Path, typer.Option("--out", metavar="FILE.html", help="The HTML file to write.")
    ],
    languages: Annotated[
        str,
        typer.Option(
            "--languages", metavar="LANG,LANG", help="Emitted code to include, e.g. stan,pymc."
        ),
    ] = "stan,pymc",
    n: N = None,
    exposure: Exposure = None,
    se: Se = None,
    events: Events = None,
    estimate: Estimate = None,
    db: DbOption = None,
) -> None:
    """Write one self-contained HTML report of a prior for a reviewer (rebuilt and verified).

    A planned study's size (--n, --exposure or --se) adds the prior predictive of its result;
    new data (--events with --n or --exposure, --estimate with --se) also adds the posterior
    and the prior-data conflict check, as predict and update give them.

    Example: priorledger report falls-control-rate --exposure 150 --events 160 --out rate.html
    """
    from registry.report.html import StudyOptions, write_report

    with err.status("rebuilding and writing the report"):
        written = write_report(
            ledger(db),
            label,
            out_file,
            languages=[x.strip() for x in languages.split(",")],
            study=StudyOptions(n, exposure, se, events, estimate),
        )
    err.print(f"written to {written.path} ({written.size} bytes); verify: {written.verify}")
