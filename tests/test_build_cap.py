"""The ESS cap solved without a refit at every solver step, and an unchanged rebuild found
from its inputs' digest (issue 13, goal 4), on the BCG trials (Colditz et al. 1994, JAMA
271:698; the fixture of tests/test_priors.py)."""

from __future__ import annotations

from pathlib import Path

import pytest

import registry.priors.build as build
from registry.priors.definition import parse_definition
from registry.priors.ess import power_for_ess_cap
from registry.priors.store import build_prior, select_entries, verify_prior
from registry.storage.ledger import Ledger
from tests.test_priors import BASE, bcg  # noqa: F401  (the fixture)

# Bayesian pooling with a predictive target (an exact predictive, so the cap is solved on its
# ESS), a normal output with a robust component; a cap of 4 participants binds (the uncapped
# ESS is about 6.8).
CAPPED = (
    BASE.replace('target = "mean"', 'target = "predictive"')
    .replace('method = "common"', 'method = "bayes"')
    .replace('mechanism = "none"', 'mechanism = "power"\nrobust_weight = 0.2\ness_cap = 4')
    .replace("[output]", '[output]\nfamily = "normal"')
)


def test_the_cap_solution_equals_the_refit_every_step_solution(bcg: Path) -> None:  # noqa: F811
    definition = parse_definition(CAPPED)
    entries = select_entries(Ledger.open(str(bcg)), definition)
    built = build.construct(definition, entries)
    ratings = [build.rate_entry(e, definition) for e in entries]
    row = build.check_selection(entries)
    # the old path: a full build (pooling, fit, robust component, ESS) at every solver step
    refit = power_for_ess_cap(
        lambda a: build._at_power(definition, entries, ratings, a, row, False).ess,
        4,
        method=build.ESS_METHOD,
    )
    assert refit < 1  # the cap binds
    tolerance = build.CAP_TOLERANCE
    assert built.result.ess[build.ESS_METHOD] == pytest.approx(4, rel=tolerance)
    # ESS grows about in proportion to the weight here, so the weights agree to the same order
    assert built.result.global_power == pytest.approx(refit, rel=2 * tolerance)


def test_an_unchanged_rebuild_pools_nothing(
    bcg: Path,  # noqa: F811
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    ledger = Ledger.open(str(bcg))
    definition = parse_definition(CAPPED)
    first = build_prior(ledger, definition)
    calls = []
    pool = build.pool_entries
    monkeypatch.setattr(build, "pool_entries", lambda *a, **k: calls.append(1) or pool(*a, **k))
    again = build_prior(ledger, definition)
    assert calls == []
    assert (again.new, again.prior.label, again.prior.digest) == (
        False,
        first.prior.label,
        first.prior.digest,
    )
    # a changed input is built again (and pools)
    changed = parse_definition(CAPPED.replace("ess_cap = 4", "ess_cap = 3"))
    assert build_prior(ledger, changed).new and calls


def test_verifying_a_capped_prior_builds_once(
    bcg: Path,  # noqa: F811
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    ledger = Ledger.open(str(bcg))
    stored = build_prior(ledger, parse_definition(CAPPED))
    assert stored.result.global_power < 1
    builds = []
    at_power = build._at_power
    monkeypatch.setattr(build, "_at_power", lambda *a, **k: builds.append(1) or at_power(*a, **k))
    result = verify_prior(ledger, stored.prior.label)
    assert result.ok and len(builds) == 1
