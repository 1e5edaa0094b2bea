"""Commands over built priors: build, priors, prior, verify, trace, emit."""

from __future__ import annotations

from pathlib import Path
from typing import TYPE_CHECKING, Annotated

import typer

from registry.caution import CAUTION
from registry.cli.common import (
    DbOption,
    JsonOption,
    UserOption,
    err,
    ledger,
    make_table,
    number,
    out,
    output_file,
    print_json,
    print_verbatim,
    reading,
)
from registry.errors import CheckFailed
from registry.values.ess_methods import ESS_METHODS

if TYPE_CHECKING:
    from rich.tree import Tree

    from registry.priors.store import StoredPrior

Label = Annotated[
    str, typer.Argument(metavar="NAME[@N]", help="A prior, latest version by default.")
]


def _ess(stored: StoredPrior) -> str:
    ess = stored.prior.ess
    parts = [f"{m} {ess[m]:.1f}" for m in ESS_METHODS if ess.get(m) is not None]
    return f"{', '.join(parts)} {ess.get('unit', '')}"


def _components(stored: StoredPrior) -> str:
    return " + ".join(
        f"{c.weight:.3g}·{c.family}({', '.join(f'{k}={v:.4g}' for k, v in c.params.items())})"
        for c in stored.prior.components
    )


def show(stored: StoredPrior) -> None:
    from rich.text import Text

    p = stored.prior
    out.print(
        Text.assemble(
            (p.label, "bold"),
            f"  digest {p.digest[:16]}  ",
            ("STALE", "red") if stored.stale else "current",
        )
    )
    out.print(
        f"  built       {stored.created_at[:19]} by {stored.created_by or '-'} "
        f"(priorledger {stored.software_version})"
    )
    out.print(f"  parameter   {p.parameter}")
    out.print(f"  scale       {p.scale}")
    out.print(f"  prior       {_components(stored)}")
    out.print(f"  ess         {_ess(stored)}")
    out.print(
        f"  from        {len(stored.uses)} entries; global power weight "
        f"{stored.result.global_power:.4g}"
    )
    if stored.result.include_retracted:
        out.print("  retracted   entries of retracted sources are included, as the definition asks")
    for note in stored.result.notes:
        out.print(f"  note        {note}")
    for reason in stored.stale:
        out.print(Text.assemble("  ", ("stale", "red"), f"       {reason}"))


def build(
    file: Annotated[Path, typer.Argument(metavar="FILE", help="Prior definition file (TOML).")],
    strict: Annotated[
        bool, typer.Option("--strict", help="A rule that matches no selected entry is an error.")
    ] = False,
    user: UserOption = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Build a prior from a definition file and store it as an immutable version.

    Example: priorledger build falls-control-rate.toml
    """
    from registry.priors.definition import load_definition
    from registry.priors.store import build_prior

    with err.status("building the prior"):
        stored = build_prior(ledger(db), load_definition(file), strict=strict, user=user)
    for warning in stored.result.warnings:
        err.print(f"warning: {warning}")
    if as_json:
        print_json(stored.to_dict())
        return
    err.print(
        f"stored {stored.prior.label}"
        if stored.new
        else f"inputs unchanged: {stored.prior.label} has the same digest; nothing stored"
    )
    show(stored)
    err.print(CAUTION)


def priors(db: DbOption = None, as_json: JsonOption = False) -> None:
    """List built priors, every version, with a stale flag.

    Example: priorledger priors --json
    """
    from registry.priors.store import list_priors

    with reading(db) as reads:
        stored = list_priors(reads)
    if as_json:
        print_json({"priors": [s.to_dict() for s in stored]})
        return
    table = make_table("prior", "scale", "components", "ess", "entries", "stale", "digest")
    for s in stored:
        table.add_row(
            s.prior.label,
            s.prior.scale,
            _components(s),
            _ess(s),
            str(len(s.uses)),
            "yes" if s.stale else "",
            s.prior.digest[:12],
        )
    out.print(table)


def prior(label: Label, db: DbOption = None, as_json: JsonOption = False) -> None:
    """Show one prior: its components, effective sample size, entries and state.

    Example: priorledger prior falls-control-rate@1
    """
    from registry.priors.store import get_prior

    with reading(db) as reads:
        stored = get_prior(reads, label)
    if as_json:
        print_json(stored.to_dict())
        return
    show(stored)
    table = make_table("entry", "rev", "weight", "power", "bias sd", "below best")
    for u in (use.to_dict() for use in stored.uses):
        worse = [f"{r['domain']}: {r['level']}" for r in u["ratings"] if r["rationale"]]
        table.add_row(
            str(u["id"]),
            str(u["revision"]),
            number(u["weight"], 3),
            number(u["discount"]["power"], 3),
            number(u["discount"]["bias_var"] ** 0.5, 3),
            "; ".join(worse),
        )
    out.print(table)


def verify(label: Label, db: DbOption = None, as_json: JsonOption = False) -> None:
    """Rebuild a prior from what was stored; exit 1 if it differs or has gone stale (one line
    per difference names the setting, entry revision or component that changed).

    Example: priorledger verify falls-control-rate
    """
    from registry.priors.store import verify_prior

    with err.status("rebuilding"):
        result = verify_prior(ledger(db), label)
    if as_json:
        print_json(result.to_dict())
    else:
        out.print(
            f"{result.label}: digest {'matches' if result.digest_matches else 'DIFFERS'}, "
            f"components {'match' if result.components_match else 'DIFFER'}"
        )
        for line in (*result.differences, *result.stale):
            out.print(f"  {line}")
    if not result.ok:
        raise CheckFailed(
            f"{result.label} does not verify: " + "; ".join((*result.differences, *result.stale))
        )


def trace(label: Label, db: DbOption = None, as_json: JsonOption = False) -> None:
    """Trace a prior to its entries (every revision and its reason), their ratings, sources, the
    numbers as reported, and the entries its selection left out.

    Example: priorledger trace falls-programme-effect --json
    """
    from registry.priors.store import trace_prior

    with reading(db) as reads:
        doc = trace_prior(reads, label)
    if as_json:
        print_json(doc)
        return
    out.print(trace_tree(doc))


def trace_tree(doc: dict, *, short: bool = False) -> Tree:
    """The trace as a tree; `short` keeps one line an entry."""
    from rich.text import Text
    from rich.tree import Tree

    tree = Tree(
        Text.assemble(
            (doc["prior"], "bold"),
            f" ({doc['scale']}) digest {doc['digest'][:16]}, built {doc['created_at'][:19]} "
            f"by {doc['created_by'] or '-'}",
        )
    )
    defn = doc["definition"]
    tree.add(
        f"definition: {defn['parameter']}; quantity {defn['select.quantity']}, "
        f"{defn['pool.method']} ({defn['pool.likelihood']}), tau prior "
        f"{defn['pool.tau_prior']}, target {defn['target']}"
    )
    for e in doc["entries"]:
        source = e["source"]
        head = (
            f"entry {e['id']} rev {e['revision']}  weight {e['weight']:.3f}  "
            f"{source['key']}{' (RETRACTED)' if source['retracted'] else ''}"
        )
        if short:
            tree.add(f"{head}  y {e['y']:.4f} se {e['se']:.4f}")
            continue
        node = tree.add(head)
        for r in e["ratings"]:
            if r["rationale"]:
                node.add(f"{r['domain']}: {r['level']} — {r['rationale']} [{r['rule']}]")
        node.add(
            f"source: {source['citation'] or source['key']} doi:{source['doi'] or '-'}"
            f" at {source['location'] or '-'}"
        )
        node.add(
            "reported: "
            + ", ".join(f"{k}={v}" for k, v in e["reported"].items())
            + f" -> {e['conversion']} -> y {e['y']:.4f}, se {e['se']:.4f} ({e['scale']})"
        )
        revisions = node.add("revisions")
        for r in e["revisions"]:
            revisions.add(
                f"{r['revision']}{' (used)' if r['used'] else ''} {r['created_at'][:19]} "
                f"by {r['created_by'] or '-'}: {r['reason']}"
            )
    if doc["left_out"]:
        left = tree.add("left out by the selection")
        for x in doc["left_out"]:
            left.add(
                f"entry {x['id']} rev {x['revision']} ({x['source']}): {'; '.join(x['reasons'])}"
            )
    return tree


def emit(
    label: Label,
    to: Annotated[
        str,
        typer.Option("--to", metavar="LANGUAGE", help="stan, pymc, numpyro, brms, jags or json."),
    ],
    param: Annotated[
        str | None, typer.Option(metavar="NAME", help="Parameter name in the code.")
    ] = None,
    out_file: Annotated[
        Path | None, typer.Option("--out", metavar="FILE", help="Write to this file.")
    ] = None,
    db: DbOption = None,
) -> None:
    """Print a prior as code for a modelling language (or as JSON).

    Example: priorledger emit falls-programme-effect --to stan --param log_rate_ratio
    """
    from registry.emit import emit as emit_code
    from registry.priors.store import get_prior

    if out_file is not None:
        output_file(out_file, "--out")
    with reading(db) as reads:
        prior = get_prior(reads, label).prior
    for reason in prior.stale:
        err.print(f"warning: {prior.label} is stale: {reason}; rebuild it before use")
    code = emit_code(prior, to, param=param)
    if out_file is None:
        print_verbatim(code)
    else:
        out_file.write_text(code, encoding="utf-8")
        err.print(f"written to {out_file}")
