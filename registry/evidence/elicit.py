"""Expert judgements (quantiles) -> one distribution per expert on the analysis scale.

A judgement sheet has one row per expert per quantity per judged quantile: `source` (the
key of the elicitation record), `expert`, `quantity`, `measure`, `level` (the probability,
`0.05` or `5%`), `value` (the judged quantile on the measure's natural scale), and the
provenance and context columns of an extraction sheet. Each expert's judgements of one
quantity are carried to the analysis scale and fitted by least squares on the quantile
function, min Σ_i (F⁻¹(p_i; θ) - g(x_i))² (the quantile-matching fit of O'Hagan et al. 2006,
*Uncertain Judgements: Eliciting Experts' Probabilities*, ch. 6, recalled from memory),
with `scipy.optimize.least_squares`. The entry's `y` and `se` are the fitted distribution's
mean and standard deviation on the analysis scale.

Several experts are combined by the equal-weight linear opinion pool, the mixture
(1/k) Σ_j f_j (Stone 1961, *Ann Math Stat* 32:1339; Genest & Zidek 1986, *Stat Sci*
1:114): its mean is the mean of the experts' means and its variance the mean of their
second moments less the squared mean; its quantiles solve the mixture's cdf = p.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

from registry.errors import ConversionError, InputError, NumericalError
from registry.evidence.convert import ANALYSIS_SCALE, MEASURES, Derived
from registry.evidence.sheets import (
    CONTEXT_FIELDS,
    KEY_PATTERN,
    SOURCE_FIELDS,
    SheetRow,
    canonical,
    identity,
    parse_number,
    read_cells,
)
from registry.values.scales import to_analysis, to_natural

REQUIRED = ("source", "expert", "quantity", "measure", "level", "value")
COLUMNS = frozenset((*REQUIRED, "tags", *SOURCE_FIELDS, *CONTEXT_FIELDS))
POOLS = ("linear",)


@dataclass(frozen=True)
class _Family:
    """A distribution fitted on the analysis scale: its scipy name, its scipy-style
    parameters from an unconstrained vector (logs of positive parameters), and a start."""

    scipy_name: str
    params: Callable[[Sequence[float]], dict[str, float]]
    start: Callable[[Sequence[float], Sequence[float]], list[float]]
    needs_positive: bool = False

    def dist(self, params: dict[str, float]) -> Any:
        from scipy import stats

        return getattr(stats, self.scipy_name)(**params)

    def make(self, t: Sequence[float]) -> Any:
        return self.dist(self.params(t))


def _line(z: Sequence[float], x: Sequence[float]) -> tuple[float, float]:
    """Intercept and slope of the least-squares line of x on z (the normal's exact fit)."""
    import numpy as np

    slope, intercept = np.polyfit(np.asarray(z, float), np.asarray(x, float), 1)
    return float(intercept), float(slope)


def _z(levels: Sequence[float]) -> list[float]:
    from scipy import stats

    return [float(stats.norm.ppf(p)) for p in levels]


def _normal_start(levels: Sequence[float], x: Sequence[float]) -> list[float]:
    loc, scale = _line(_z(levels), x)
    return [loc, math.log(max(scale, 1e-12))]


def _lognormal_start(levels: Sequence[float], x: Sequence[float]) -> list[float]:
    return _normal_start(levels, [math.log(v) for v in x])


def _gamma_start(levels: Sequence[float], x: Sequence[float]) -> list[float]:
    """Shape and scale matching the normal line's mean and sd (a = m²/s², scale = s²/m)."""
    mean, sd = _line(_z(levels), x)
    shape = (mean / max(sd, 1e-12)) ** 2
    return [math.log(shape), math.log(mean / shape)]


FAMILIES: dict[str, _Family] = {
    "normal": _Family("norm", lambda t: {"loc": t[0], "scale": math.exp(t[1])}, _normal_start),
    "lognormal": _Family(
        "lognorm", lambda t: {"s": math.exp(t[1]), "scale": math.exp(t[0])}, _lognormal_start, True
    ),
    "gamma": _Family(
        "gamma", lambda t: {"a": math.exp(t[0]), "scale": math.exp(t[1])}, _gamma_start, True
    ),
}


@dataclass(frozen=True)
class Judgement:
    row: int
    level: float
    value: float  # natural scale, as judged
    text: str  # as entered


@dataclass(frozen=True)
class ExpertFit:
    """One expert's judgements of one quantity and the distribution fitted to them."""

    source: str
    expert: str
    quantity: str
    measure: str
    scale: str
    family: str
    params: dict[str, float]
    mean: float
    sd: float
    rms_error: float  # of the fitted quantiles at the judged levels, on the analysis scale
    max_error: float
    judgements: tuple[Judgement, ...]
    context: dict[str, str] = field(default_factory=dict)
    source_info: dict[str, str] = field(default_factory=dict)
    tags: tuple[str, ...] = ()

    def frozen(self) -> Any:
        """The fitted distribution on the analysis scale (scipy)."""
        return FAMILIES[self.family].dist(self.params)

    def to_dict(self) -> dict[str, Any]:
        return {
            "expert": self.expert,
            "source": self.source,
            "quantity": self.quantity,
            "measure": self.measure,
            "scale": self.scale,
            "family": self.family,
            "params": self.params,
            "y": self.mean,
            "se": self.sd,
            "rms_error": self.rms_error,
            "max_error": self.max_error,
            "judgements": {repr(j.level): j.text for j in self.judgements},
        }


@dataclass(frozen=True)
class LinearPool:
    """The equal-weight linear opinion pool of several experts' fits of one quantity."""

    members: tuple[ExpertFit, ...]

    @property
    def mean(self) -> float:
        return sum(m.mean for m in self.members) / len(self.members)

    @property
    def sd(self) -> float:
        second = sum(m.sd**2 + m.mean**2 for m in self.members) / len(self.members)
        return math.sqrt(max(second - self.mean**2, 0.0))

    def cdf(self, y: float) -> float:
        return sum(float(m.frozen().cdf(y)) for m in self.members) / len(self.members)

    def quantile(self, p: float) -> float:
        """The mixture's p-quantile: the root of cdf(y) = p, bracketed by the members'."""
        from scipy.optimize import brentq

        ends = [m.frozen().ppf(p) for m in self.members]
        lo, hi = min(ends), max(ends)
        if lo == hi:
            return float(lo)
        return float(brentq(lambda y: self.cdf(y) - p, lo, hi, xtol=1e-13, rtol=1e-13))

    def to_dict(self) -> dict[str, Any]:
        first = self.members[0]
        return {
            "quantity": first.quantity,
            "experts": [m.expert for m in self.members],
            "method": "linear",
            "scale": first.scale,
            "y": self.mean,
            "se": self.sd,
            "quantiles": {repr(p): self.quantile(p) for p in _levels(self.members)},
        }


def _levels(fits: Sequence[ExpertFit]) -> list[float]:
    return sorted({j.level for f in fits for j in f.judgements})


@dataclass(frozen=True)
class Elicitation:
    path: str
    family: str
    fits: tuple[ExpertFit, ...]
    pools: tuple[LinearPool, ...] = ()

    def rows(self) -> list[SheetRow]:
        """The entries to store: one per expert and quantity, then one per pool."""
        return [_expert_row(f) for f in self.fits] + [_pool_row(p, self.family) for p in self.pools]

    def to_dict(self) -> dict[str, Any]:
        return {
            "path": self.path,
            "family": self.family,
            "experts": [f.to_dict() for f in self.fits],
            "pools": [p.to_dict() for p in self.pools],
        }


def _expert_row(fit: ExpertFit) -> SheetRow:
    reported = {f"quantile_{j.level!r}": j.text for j in fit.judgements}
    numbers = {f"quantile_{j.level!r}": canonical(j.value, False) for j in fit.judgements}
    study = f"{fit.source}/{fit.expert}"
    corrections = (
        f"least-squares fit of a {fit.family} on the {fit.scale} scale to "
        f"{len(fit.judgements)} judged quantiles: root-mean-square error "
        f"{fit.rms_error:.3g}, largest {fit.max_error:.3g} ({fit.scale} scale); y and se are "
        f"the fitted distribution's mean and sd on the {fit.scale} scale",
    )
    return _row(fit, study, reported, numbers, f"elicited_{fit.family}_quantile_lsq", corrections)


def _pool_row(pool: LinearPool, family: str) -> SheetRow:
    first = pool.members[0]
    experts = ";".join(m.expert for m in pool.members)
    reported = {
        f"quantile_{p!r}": repr(to_natural(first.scale, pool.quantile(p)))
        for p in _levels(pool.members)
    }
    numbers = {k: canonical(float(v), False) for k, v in reported.items()}
    corrections = (
        f"equal-weight linear opinion pool (Stone 1961; Genest & Zidek 1986) of experts "
        f"{experts.replace(';', ', ')}, each fitted as a {family} on the {first.scale} scale; "
        f"y and se are the pool's mean and sd on the {first.scale} scale (the pool is a "
        "mixture); reported are its quantiles; use either the pool or its experts in one "
        "prior, not both",
    )
    return _row(
        replace(first, mean=pool.mean, sd=pool.sd),
        f"{first.source}/pool",
        reported,
        {**numbers, "experts": experts},
        "linear_pool_moments",
        corrections,
        tags=("expert-pool",),
        extra={"x_pool_of": experts},
    )


def _row(
    fit: ExpertFit,
    study: str,
    reported: dict[str, str],
    numbers: dict[str, str],
    conversion: str,
    corrections: tuple[str, ...],
    *,
    tags: tuple[str, ...] = (),
    extra: dict[str, str] | None = None,
) -> SheetRow:
    numbers = {**numbers, "family": fit.family}
    return SheetRow(
        row=fit.judgements[0].row,
        source=fit.source,
        study=study,
        quantity=fit.quantity,
        measure=fit.measure,
        reported=reported,
        derived=Derived(fit.mean, fit.sd, fit.scale, conversion, corrections),
        context={**fit.context, "design": "expert"},
        source_info=fit.source_info,
        tags=tuple(sorted({*fit.tags, *tags, "expert"})),
        extra=extra or {"x_expert": fit.expert},
        fingerprint=identity(fit.source, study, fit.quantity, fit.measure, numbers),
        numbers=numbers,
    )


def fit_judgements(
    levels: Sequence[float], values: Sequence[float], family: str = "normal"
) -> tuple[dict[str, float], float, float, float, float]:
    """Least squares on the quantile function: parameters, mean, sd, RMS and largest error.

    `values` are on the analysis scale, `levels` strictly increasing with them.
    """
    import numpy as np
    from scipy.optimize import least_squares

    fam = FAMILIES[family]

    def residuals(t: Sequence[float]) -> Any:
        return fam.make(t).ppf(levels) - np.asarray(values, float)

    start = fam.start(levels, values)
    result = least_squares(residuals, start, xtol=1e-15, ftol=1e-15, gtol=1e-15, method="lm")
    dist = fam.make(result.x)
    mean, sd = float(dist.mean()), float(dist.std())
    errors = np.abs(residuals(result.x))
    if not (result.success and math.isfinite(mean) and math.isfinite(sd) and sd > 0):
        raise NumericalError(f"the {family} fit did not converge: {result.message}")
    rms = float(np.sqrt(np.mean(errors**2)))
    return fam.params(list(result.x)), mean, sd, rms, float(errors.max())


def _read(path: Path, decimal_comma: bool) -> dict[tuple[str, str], list[dict[str, Any]]]:
    """The sheet's rows grouped by (expert, quantity), each row parsed and checked."""
    groups: dict[tuple[str, str], list[dict[str, Any]]] = {}
    cells_by_row = read_cells(path, columns=COLUMNS, required=REQUIRED, decimal_comma=decimal_comma)
    for number, cells in enumerate(cells_by_row, start=2):
        if not cells:
            continue
        try:
            parsed = _parse(cells, decimal_comma)
        except InputError as error:
            raise error.located(path=str(path), row=number) from None
        groups.setdefault((parsed["expert"], parsed["quantity"]), []).append(
            {**parsed, "row": number}
        )
    if not groups:
        raise InputError("the sheet has no judgements", path=str(path))
    return groups


def _parse(cells: dict[str, str], decimal_comma: bool) -> dict[str, Any]:
    for name in REQUIRED:
        if not cells.get(name):
            raise InputError("required value is empty", field=name)
    for name in ("source", "expert", "quantity"):
        if not KEY_PATTERN.fullmatch(cells[name]):
            raise InputError(
                f"{cells[name]!r} is not a key: use letters, digits and _ . : / + -", field=name
            )
    measure = cells["measure"]
    if measure not in MEASURES:
        raise InputError(
            f"unknown measure {measure!r}; one of {', '.join(MEASURES)}", field="measure"
        )
    if cells.get("design", "expert") != "expert":
        raise InputError(f"judgements have design expert, got {cells['design']!r}", field="design")
    level, _ = _number(cells, "level", measure, decimal_comma)
    if not 0.0 < level < 1.0:
        raise InputError(
            f"must be strictly between 0 and 1 (or 0% and 100%), got {level}", field="level"
        )
    value, text = _number(cells, "value", measure, decimal_comma)
    scale = ANALYSIS_SCALE[measure]
    try:
        on_scale = to_analysis(scale, value)
    except ConversionError as error:
        raise InputError(f"{error.message}", field="value") from None
    return {
        "source": cells["source"],
        "expert": cells["expert"],
        "quantity": cells["quantity"],
        "measure": measure,
        "judgement": Judgement(0, level, value, text),
        "y": on_scale,
        "context": {k: cells[k] for k in CONTEXT_FIELDS if k in cells and k != "design"},
        "source_info": {k: cells[k] for k in SOURCE_FIELDS if k in cells},
        "tags": tuple(t.strip() for t in cells.get("tags", "").split(";") if t.strip()),
    }


def _number(
    cells: dict[str, str], name: str, measure: str, decimal_comma: bool
) -> tuple[float, str]:
    value, bound = parse_number(cells[name], name, measure, decimal_comma=decimal_comma)
    if bound:
        raise InputError("a judgement is a number, not an inequality", field=name)
    return value, cells[name].replace(",", ".") if decimal_comma else cells[name]


def _one(group: list[dict[str, Any]], name: str, path: Path) -> Any:
    for row in group[1:]:
        if row[name] != group[0][name]:
            raise InputError(
                f"differs from row {group[0]['row']} ({group[0][name]!r}) for the same expert "
                "and quantity",
                field=name,
                row=row["row"],
                path=str(path),
            )
    return group[0][name]


def _fit_group(group: list[dict[str, Any]], family: str, path: Path) -> ExpertFit:
    ordered = sorted(group, key=lambda r: r["judgement"].level)
    measure = _one(ordered, "measure", path)
    for before, after in itertools.pairwise(ordered):
        if after["judgement"].level == before["judgement"].level:
            raise InputError(
                f"level {after['judgement'].level:g} is judged twice (also row {before['row']})",
                field="level",
                row=after["row"],
                path=str(path),
            )
        if after["y"] <= before["y"]:
            raise InputError(
                f"judgements must increase with the level: {after['judgement'].text} at level "
                f"{after['judgement'].level:g} is not above {before['judgement'].text} at level "
                f"{before['judgement'].level:g} (row {before['row']})",
                field="value",
                row=after["row"],
                path=str(path),
            )
    first = ordered[0]
    if len(ordered) < 2:
        raise InputError(
            "an expert needs at least two judged quantiles of a quantity (three or more "
            "show how well the distribution fits)",
            field="level",
            row=first["row"],
            path=str(path),
        )
    scale = ANALYSIS_SCALE[measure]
    values = [r["y"] for r in ordered]
    if FAMILIES[family].needs_positive and values[0] <= 0:
        raise InputError(
            f"a {family} needs judgements above 0 on the {scale} scale, got {values[0]:g}",
            field="value",
            row=first["row"],
            path=str(path),
        )
    params, mean, sd, rms, worst = fit_judgements(
        [r["judgement"].level for r in ordered], values, family
    )
    return ExpertFit(
        source=_one(ordered, "source", path),
        expert=first["expert"],
        quantity=first["quantity"],
        measure=measure,
        scale=scale,
        family=family,
        params=params,
        mean=mean,
        sd=sd,
        rms_error=rms,
        max_error=worst,
        judgements=tuple(replace(r["judgement"], row=r["row"]) for r in ordered),
        context={k: v for r in ordered for k, v in r["context"].items()},
        source_info={k: v for r in ordered for k, v in r["source_info"].items()},
        tags=tuple(sorted({t for r in ordered for t in r["tags"]})),
    )


def read_elicitation(
    path: str | Path,
    *,
    family: str = "normal",
    pool: str | None = None,
    decimal_comma: bool = False,
) -> Elicitation:
    """Fit every expert's judgements of every quantity in a judgement sheet (and pool them)."""
    path = Path(path)
    if family not in FAMILIES:
        raise InputError(
            f"family must be one of {', '.join(FAMILIES)}, got {family!r}", field="--family"
        )
    if pool is not None and pool not in POOLS:
        raise InputError(f"pool must be one of {', '.join(POOLS)}, got {pool!r}", field="--pool")
    if not path.is_file():
        raise InputError("no such file", path=str(path))
    fits = tuple(_fit_group(g, family, path) for g in _read(path, decimal_comma).values())
    pools: list[LinearPool] = []
    if pool is not None:
        by_quantity: dict[str, list[ExpertFit]] = {}
        for fit in fits:
            by_quantity.setdefault(fit.quantity, []).append(fit)
        for quantity, members in by_quantity.items():
            if len({(m.source, m.measure) for m in members}) > 1:
                raise InputError(
                    f"experts judging {quantity!r} differ in source or measure; a pool needs one",
                    field="source",
                    path=str(path),
                )
            if len(members) > 1:
                pools.append(LinearPool(tuple(members)))
    return Elicitation(str(path), family, fits, tuple(pools))
