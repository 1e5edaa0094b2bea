"""The contributor guide's recipes, followed once each with a toy addition at test time: a
family, a measure and an output language, each added by a table entry and one small piece.

References: scipy.stats' logistic distribution (density, quantiles, variance pi² s² / 3);
the Cochrane Handbook's SE from a 95% CI, (ln upper - ln lower) / 3.92 (v6 §6.3.2).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np
import pytest
from scipy import special, stats

from registry import emit
from registry.emit import names, stan
from registry.emit.common import comment_block, header, literal
from registry.errors import InputError
from registry.evidence.convert import derive
from registry.priors.ess import ess_all
from registry.values import families, measures
from registry.values.prior import Component, Prior


@dataclass(frozen=True)
class Logistic(families.Family):
    """Logistic(loc, scale): log p(x) = -z - 2 log(1 + e^-z) - log s, z = (x - loc)/s."""

    name: ClassVar[str] = "logistic"
    scipy_name: ClassVar[str] = "logistic"
    support: ClassVar[str] = "real"
    unbounded: ClassVar[frozenset[str]] = frozenset({"loc"})
    loc: float
    scale: float

    def canonical_terms(self, phi: Any) -> tuple[Any, Any, Any]:
        z = (np.asarray(phi, dtype=float) - self.loc) / self.scale
        e = special.expit(z)
        value = -z - 2 * np.logaddexp(0.0, -z) - math.log(self.scale)
        return value, (1 - 2 * e) / self.scale, -2 * e * (1 - e) / self.scale**2

    def canonical_ppf(self, u: float) -> float:
        return self.loc + self.scale * float(special.logit(u))

    def tail_rates(self) -> tuple[float, float]:
        return 1 / self.scale, 1 / self.scale


def test_adding_a_family(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(families.FAMILIES, "logistic", Logistic)
    monkeypatch.setitem(
        stan.FORMS, "logistic", ("logistic", lambda p: {"mu": p["loc"], "sigma": p["scale"]})
    )
    prior = Prior(
        "toy", 1, "0" * 64, "identity", (Component("logistic", {"loc": 1.0, "scale": 2.0}),)
    )
    ref = stats.logistic(1.0, 2.0)
    assert prior.ppf(0.9) == pytest.approx(ref.ppf(0.9))
    assert prior.var() == pytest.approx(math.pi**2 * 4 / 3)
    # normal data with unit sd 4: variance matching gives 16 / var
    assert ess_all(prior, unit_sd=4.0)["variance_match"] == pytest.approx(16 / ref.var())
    assert "toy ~ logistic(1.0, 2.0);" in emit.emit(prior, "stan", param="toy")
    with pytest.raises(InputError):  # a language without the form says so
        emit.emit(prior, "jags", param="toy")


def test_adding_a_measure(monkeypatch: pytest.MonkeyPatch) -> None:
    """A ratio of means (arm a over arm b) on the log scale: one row of the measure table."""
    row = measures.Measure("ratio_of_means", "log", "log ratio of means (arm a over arm b)",
                           ratio=True)  # fmt: skip
    monkeypatch.setitem(measures.MEASURES, row.name, row)
    derived = derive("ratio_of_means", {"estimate": 0.8, "lower": 0.64, "upper": 1.0})
    assert derived.scale == "log" and derived.y == pytest.approx(math.log(0.8))
    assert derived.se == pytest.approx((math.log(1.0) - math.log(0.64)) / 3.919927969, rel=1e-6)
    p_form = derive("ratio_of_means", {"estimate": 0.8, "p": 0.05})  # a contrast: has a null
    assert p_form.se == pytest.approx(abs(math.log(0.8)) / 1.959963985, rel=1e-6)


def toy_render(prior: Prior, name: str) -> str:
    """A toy language: one line per component, `name ~ w * family(params)`."""
    lines = comment_block(header(prior, "toy", name, None), "%")
    lines += [
        f"{name} ~ {literal(c.weight)} * {c.family}({', '.join(map(literal, c.params.values()))})"
        for c in prior.components
    ]
    return "\n".join(lines) + "\n"


def test_adding_an_output_language(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setitem(emit._CODE, "toy", toy_render)
    monkeypatch.setitem(names.RESERVED, "toy", frozenset({"pi"}))
    prior = Prior("toy", 2, "0" * 64, "log", (Component("normal", {"loc": -0.2, "scale": 0.1}),))
    text = emit.emit(prior, "toy", param="b")
    assert text.splitlines()[-1] == "b ~ 1.0 * normal(-0.2, 0.1)"
    assert all(line.startswith("% ") for line in text.splitlines()[:-1])
    with pytest.raises(InputError):  # the language's reserved words are checked
        emit.emit(prior, "toy", param="pi")
