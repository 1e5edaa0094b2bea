"""`priorledger design`: operating characteristics of a planned trial that borrows."""

from __future__ import annotations

import time
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Any

import typer

from registry.cli.common import (
    DbOption,
    JsonOption,
    err,
    ledger,
    make_table,
    number,
    option,
    out,
    print_json,
)

if TYPE_CHECKING:
    from registry.checks.design import DesignResult

# A progress bar appears only once a run has taken this long (seconds).
QUIET_FOR = 1.0


class _Bar:
    """A Rich progress bar on stderr that stays hidden for runs shorter than QUIET_FOR."""

    def __init__(self) -> None:
        self.start = time.perf_counter()
        self.bar: Any = None
        self.task: Any = None

    def __call__(self, what: str, fraction: float) -> None:
        if self.bar is None:
            if time.perf_counter() - self.start < QUIET_FOR:
                return
            from rich.progress import Progress

            self.bar = Progress(console=err, transient=True)
            self.bar.start()
            self.task = self.bar.add_task("design", total=1.0)
        self.bar.update(self.task, completed=fraction, description=what)

    def stop(self) -> None:
        if self.bar is not None:
            self.bar.stop()


def design(
    label: Annotated[
        str, typer.Argument(metavar="NAME[@N]", help="A prior, latest version by default.")
    ],
    control_n: Annotated[
        int | None, option("--control-n", "N", "Binary endpoint: participants in the control arm.")
    ] = None,
    treatment_n: Annotated[
        int | None, option("--treatment-n", "N", "Binary endpoint: treatment arm participants.")
    ] = None,
    control_exposure: Annotated[
        float | None, option("--control-exposure", "E", "Count endpoint: control arm exposure.")
    ] = None,
    treatment_exposure: Annotated[
        float | None,
        option("--treatment-exposure", "E", "Count endpoint: treatment arm exposure."),
    ] = None,
    se: Annotated[
        float | None, option("--se", "SE", "Normal endpoint: the planned standard error.")
    ] = None,
    reference: Annotated[
        float | None,
        option("--reference", "VALUE", "One arm: the fixed value to beat (natural scale)."),
    ] = None,
    margin: Annotated[
        float,
        typer.Option(
            metavar="M",
            help="Success needs the contrast beyond M in the better direction (difference for "
            "proportions, log rate ratio for rates).",
        ),
    ] = 0.0,
    decide: Annotated[
        float,
        typer.Option(metavar="C", help="Success when P(better by more than the margin) > C."),
    ] = 0.975,
    better: Annotated[
        str, typer.Option(metavar="higher|lower", help="Which direction is better.")
    ] = "higher",
    futility: Annotated[
        float | None,
        option("--futility", "F", "Also report P(futility): that posterior probability < F."),
    ] = None,
    truth: Annotated[
        str | None,
        option(
            "--truth",
            "LO:HI:K",
            "True control values (natural scale); default around the prior, with conflict on "
            "both sides.",
        ),
    ] = None,
    effect: Annotated[
        list[float] | None,
        option("--effect", "D", "True effect on the contrast's scale (repeatable; 0 is the null)."),
    ] = None,
    treatment_prior: Annotated[
        str,
        typer.Option(
            metavar="FAMILY:P1,P2",
            help="Weakly informative prior of the treatment arm (and of the control arm without "
            "borrowing); auto is Beta(1, 1) or a one-event gamma at the prior's mean.",
        ),
    ] = "auto",
    alpha: Annotated[
        float | None,
        option("--alpha", "A", "Calibrate the threshold so that the type I error is <= A."),
    ] = None,
    calibrate: Annotated[
        str,
        typer.Option(
            metavar="central|worst",
            help="Calibrate at the prior's median control value, or the worst scenario.",
        ),
    ] = "central",
    plot: Annotated[
        Path | None,
        option("--plot", "FILE", "Draw success against the truth (.png, .pdf or .svg)."),
    ] = None,
    db: DbOption = None,
    as_json: JsonOption = False,
) -> None:
    """Operating characteristics of a planned trial whose control arm (or effect) gets a prior:
    type I error, power, bias, a calibrated threshold, assurance. Writes nothing.

    Example: priorledger design falls-control-rate --control-exposure 150 --treatment-exposure 150
    """
    from registry.checks.design import DesignSpec, design_from_registry, truth_grid

    spec = DesignSpec(
        control_n=control_n,
        treatment_n=treatment_n,
        control_exposure=control_exposure,
        treatment_exposure=treatment_exposure,
        se=se,
        reference=reference,
        margin=margin,
        threshold=decide,
        better=better,
        futility=futility,
        truths=None if truth is None else truth_grid(truth),
        effects=tuple(effect) if effect else (0.0,),
        treatment_prior=treatment_prior,
        alpha=alpha,
        calibrate=calibrate,
    )
    bar = _Bar()
    try:
        result = design_from_registry(ledger(db), label, spec, progress=bar)
    finally:
        bar.stop()
    for warning in result.warnings:
        err.print(f"warning: {warning}; rebuild it before use")
    if plot is not None:
        from registry.report.design_plot import design_plot

        err.print(f"figure written to {design_plot(plot, result)}")
    if as_json:
        print_json(result.to_dict())
        return
    render(result)


def render(result: DesignResult) -> None:
    from rich.text import Text

    from registry.checks.design import DESIGN_CAUTION

    d, p = result.design, result.prior
    rule = d["decision_rule"]
    out.print(
        Text.assemble(("design", "bold"), f" with {p['label']} ({p['measure']}, {p['scale']})")
    )
    ess = p["ess"]
    if ess.get("value") is not None:
        out.print(
            f"  prior ESS        {ess['value']:.1f} {ess.get('unit', '')} ({ess.get('method')})"
        )
    out.print(f"  endpoint         {d['endpoint']}; {d['arms']} arm(s); sizes {d['sizes']}")
    if d["treatment_prior"]:
        out.print(f"  treatment prior  {d['treatment_prior']}")
    out.print(f"  without borrowing {d['without_borrowing']}")
    out.print(f"  success          {rule['success']}")
    out.print(f"  method           {result.method['name']}: {result.method['how']}")
    trunc = result.method.get("truncation")
    if trunc:
        out.print(
            f"  truncation       outcomes beyond a tail of {trunc['tail_bound']:g} left out; "
            f"largest omitted probability {trunc['largest_omitted']:.2g}"
        )
    headers = [
        "control",
        "treatment",
        "effect",
        "success",
        "no borrowing",
        "bias",
        "rmse",
        "bias (no b.)",
        "rmse (no b.)",
    ]
    futility = rule["futility"] is not None
    calibrated = result.calibrated_threshold is not None and (
        result.calibrated_threshold.threshold is not None
    )
    headers += ["futility", "futility (no b.)"] if futility else []
    headers += ["success at calibrated C"] if calibrated else []
    table = make_table(*headers)
    for s in result.scenarios:
        row = [
            number(s.control),
            number(s.treatment),
            number(s.effect),
            number(s.success),
            number(s.success_without_borrowing),
            number(s.bias),
            number(s.rmse),
            number(s.bias_without_borrowing),
            number(s.rmse_without_borrowing),
        ]
        row += [number(s.futility), number(s.futility_without_borrowing)] if futility else []
        row += [number(s.success_calibrated)] if calibrated else []
        table.add_row(*row)
    out.print(table)
    c = result.calibrated_threshold
    if c is not None:
        if c.threshold is None:
            out.print(f"  calibration      none: {c.reason}")
        else:
            out.print(
                f"  calibrated C     {c.threshold} (type I error {c.type1:.4f} at {c.at}"
                + (f"; {c.next_threshold} gives {c.next_type1:.4f})" if c.next_type1 else ")")
            )
    for a in result.assurance or ():
        effect = "" if a.effect is None else f" at effect {a.effect:g}"
        out.print(
            f"  assurance{effect}  {a.assurance:.4f} with the prior, "
            f"{a.assurance_without_borrowing:.4f} without (error <= {a.error_bound:.1g})"
        )
    for note in result.notes:
        out.print(f"  note: {note}")
    out.print(DESIGN_CAUTION)
