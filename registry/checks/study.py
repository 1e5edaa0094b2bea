"""A planned or observed study in a prior's own terms, read from the options a person gives.

What a study reports follows from the prior's measure (the measure table): events out of n for
a proportion, events in an exposure for a rate, and otherwise an estimate with its standard
error on the measure's analysis scale. An option that does not match the measure is an input
error naming the option.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from registry.checks.observations import OBSERVATIONS, Observation
from registry.errors import InputError
from registry.values.measures import measure


@dataclass(frozen=True)
class Terms:
    """How a likelihood's studies are given: the size option, the result option, their words."""

    likelihood: str
    size_option: str
    result_option: str
    outcome: str  # what the planned study's result is: events or estimate
    size_words: str


TERMS: dict[str, Terms] = {
    "binomial": Terms("binomial", "--n", "--events", "events", "events out of N participants"),
    "poisson": Terms("poisson", "--exposure", "--events", "events", "events in exposure E"),
    "normal": Terms(
        "normal", "--se", "--estimate", "estimate", "an estimate with standard error S"
    ),
}


def likelihood_of(measure_name: str) -> str:
    """binomial (a proportion), poisson (a rate) or normal (every other measure)."""
    row = measure(measure_name)
    return row.count.likelihood if row.count is not None else "normal"


@dataclass(frozen=True)
class Study:
    """A study's size (n, exposure or se) and, once observed, its result (events or estimate)."""

    likelihood: str
    size: float
    result: float | None = None

    @property
    def terms(self) -> Terms:
        return TERMS[self.likelihood]

    @property
    def observation(self) -> Observation:
        return OBSERVATIONS[self.likelihood]

    def to_dict(self) -> dict[str, float | None]:
        t = self.terms
        doc: dict[str, float | None] = {t.size_option.lstrip("-"): self.size}
        if self.result is not None:
            doc[t.result_option.lstrip("-")] = self.result
        return doc


def _given(options: dict[str, float | None]) -> dict[str, float]:
    return {k: v for k, v in options.items() if v is not None}


def _check_match(measure_name: str, options: dict[str, float | None]) -> Terms:
    terms = TERMS[likelihood_of(measure_name)]
    wanted = {terms.size_option, terms.result_option}
    for option in _given(options):
        if option not in wanted:
            raise InputError(
                f"a prior for a {measure_name} takes {terms.size_words} "
                f"({terms.result_option}, {terms.size_option}), not {option}",
                field=option,
            )
    return terms


def _whole(value: float, option: str, *, least: int) -> float:
    if not (math.isfinite(value) and value == int(value) and value >= least):
        raise InputError(f"must be a whole number of at least {least}, got {value:g}", field=option)
    return float(value)


def _check_size(terms: Terms, size: float | None) -> float:
    if size is None:
        raise InputError(f"give the study's size as {terms.size_option}", field=terms.size_option)
    if OBSERVATIONS[terms.likelihood].bounded:  # a number of participants
        return _whole(size, terms.size_option, least=1)
    if not (math.isfinite(size) and size > 0):
        raise InputError(f"must be greater than 0, got {size:g}", field=terms.size_option)
    return float(size)


def planned(measure_name: str, **options: float | None) -> Study:
    """A planned study: `n`, `exposure` or `se`, whichever the measure takes."""
    given = {f"--{k}": v for k, v in options.items()}
    terms = _check_match(measure_name, given)
    if terms.result_option in _given(given):
        raise InputError(
            "a planned study has no result yet; give only its size", field=terms.result_option
        )
    return Study(terms.likelihood, _check_size(terms, given.get(terms.size_option)))


def observed(measure_name: str, **options: float | None) -> Study:
    """An observed study: events and n, events and exposure, or an estimate and se."""
    given = {f"--{k}": v for k, v in options.items()}
    terms = _check_match(measure_name, given)
    size = _check_size(terms, given.get(terms.size_option))
    result = given.get(terms.result_option)
    if result is None:
        raise InputError(
            f"give the study's result as {terms.result_option}", field=terms.result_option
        )
    if not OBSERVATIONS[terms.likelihood].counts:
        if not math.isfinite(result):
            raise InputError(f"must be a finite number, got {result}", field="--estimate")
        return Study(terms.likelihood, size, float(result))
    events = _whole(result, "--events", least=0)
    if OBSERVATIONS[terms.likelihood].bounded and events > size:
        raise InputError(f"events ({events:g}) cannot exceed n ({size:g})", field="--events")
    return Study(terms.likelihood, size, events)
