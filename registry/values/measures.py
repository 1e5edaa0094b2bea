"""The measure table: what each reported measure is, where it is pooled, and what it implies.

One row per measure of an extraction sheet. Everything the rest of the package needs to know
about a measure is a column here, so that adding a measure is adding a row:

- ``scale``: the analysis scale where its sampling distribution is close to normal (Borenstein,
  Hedges, Higgins & Rothstein 2009, *Introduction to Meta-Analysis*, ch. 5-6; Cochrane Handbook
  v6 §6.3): log for ratios and rates, logit for proportions, Fisher's z for correlations,
  identity for the rest;
- ``null``: the value of no effect on the analysis scale (0 for a difference or a log ratio), or
  None for a level (a proportion, a rate, a mean), which has no null value;
- ``bounds``: the natural-scale range of a measure on the identity scale that has one;
- ``count``: the exact count likelihood and the reported fields it reads (binomial-logit from
  events of a total, Poisson-log from events in an exposure);
- ``natural_family`` and ``natural_scale``: the conjugate family of that likelihood and the
  scale it lives on (beta on the probability scale, gamma on the rate scale);
- ``unit_sd``: the default standard deviation of one unit's observation on the analysis scale,
  for the effective sample size, with its unit and source; None where the data alone cannot
  say (a mean in the outcome's own units), so that a definition must state it.

Stdlib only, so that the CLI starts quickly.
"""

from __future__ import annotations

from dataclasses import dataclass

from registry.errors import InputError


@dataclass(frozen=True)
class CountForm:
    """An exact count likelihood and the reported fields it is read from."""

    likelihood: str  # binomial | poisson
    events: str
    size: str  # total | exposure
    unit: str  # what one unit of the size is, for an effective sample size


@dataclass(frozen=True)
class UnitSd:
    """The sd of one unit's observation on the analysis scale, its unit, and its source."""

    sd: float
    unit: str
    source: str


@dataclass(frozen=True)
class Measure:
    name: str
    scale: str
    meaning: str
    null: float | None = 0.0
    ratio: bool = False
    bounds: tuple[float, float] | None = None
    count: CountForm | None = None
    natural_family: str | None = None
    natural_scale: str | None = None
    unit_sd: UnitSd | None = None

    @property
    def is_level(self) -> bool:
        """A level (no null value), as opposed to a contrast between arms."""
        return self.null is None


_RATIO_EVENTS = UnitSd(
    2.0,
    "events",
    "var(log ratio) ≈ 4/events for two arms of equal size (Spiegelhalter, Abrams & Myles "
    "2004, recalled from memory)",
)

_TABLE = (
    Measure(
        "proportion",
        "logit",
        "logit of a probability",
        null=None,
        count=CountForm("binomial", "events", "total", "participants"),
        natural_family="beta",
        natural_scale="probability",
    ),
    Measure(
        "rate",
        "log",
        "log of an event rate (events per unit of exposure)",
        null=None,
        count=CountForm("poisson", "events", "exposure", "units of exposure"),
        natural_family="gamma",
        natural_scale="rate",
    ),
    Measure("mean", "identity", "mean, in the outcome's own units", null=None),
    Measure(
        "mean_difference",
        "identity",
        "difference in means (arm a minus arm b), in the outcome's units",
    ),
    Measure(
        "smd",
        "identity",
        "standardized mean difference (arm a minus arm b)",
        unit_sd=UnitSd(
            2.0, "participants", "var(d) ≈ 4/N for two equal arms (Borenstein et al. 2009)"
        ),
    ),
    Measure("odds_ratio", "log", "log odds ratio (arm a over arm b)", ratio=True),
    Measure("risk_ratio", "log", "log risk ratio (arm a over arm b)", ratio=True),
    Measure(
        "rate_ratio", "log", "log rate ratio (arm a over arm b)", ratio=True, unit_sd=_RATIO_EVENTS
    ),
    Measure(
        "hazard_ratio",
        "log",
        "log hazard ratio (arm a over arm b)",
        ratio=True,
        unit_sd=_RATIO_EVENTS,
    ),
    Measure(
        "risk_difference",
        "identity",
        "risk difference (arm a minus arm b)",
        bounds=(-1.0, 1.0),
    ),
    Measure(
        "correlation",
        "fisher_z",
        "Fisher z of a correlation",
        unit_sd=UnitSd(1.0, "participants", "var(z) = 1/(n - 3) (Fisher 1921)"),
    ),
    Measure(
        "coefficient", "identity", "regression coefficient, on the scale the model reported it"
    ),
)

MEASURES: dict[str, Measure] = {m.name: m for m in _TABLE}
NAMES: tuple[str, ...] = tuple(MEASURES)


def measure(name: str) -> Measure:
    """The table row of `name`; an unknown measure is an input error naming the choices."""
    try:
        return MEASURES[name]
    except KeyError:
        raise InputError(
            f"measure must be one of {', '.join(NAMES)}, got {name!r}", field="measure"
        ) from None


def count_form(likelihood: str) -> CountForm:
    """The count form of a count likelihood (binomial or poisson)."""
    for m in _TABLE:
        if m.count is not None and m.count.likelihood == likelihood:
            return m.count
    raise InputError(f"no count likelihood {likelihood!r}", field="likelihood")
