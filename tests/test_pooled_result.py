"""Every pooled result, frequentist or Bayesian, satisfies the one contract of
`registry.synthesis.result.PooledResult`.

Data: BCG vaccine trials (Colditz et al. 1994, JAMA 271:698), log risk ratios; counts recalled
from memory (see tests/test_frequentist.py).
"""

from __future__ import annotations

import json

import pytest

from registry.synthesis import PooledResult, Predictive, fit_normal
from registry.synthesis.frequentist import pool
from tests.test_frequentist import SE, Y

RESULTS = {
    "reml": lambda: pool(Y, SE, "reml"),
    "dl with hksj": lambda: pool(Y, SE, "dl", hksj=True),
    "common": lambda: pool(Y, SE, "common"),
    "bayes": lambda: fit_normal(Y, SE, "half-normal:0.5"),
}
CONTRACT_KEYS = ("k", "method", "mu", "se", "ci", "tau2", "i2", "q", "prediction", "notes")


@pytest.mark.parametrize("name", list(RESULTS))
def test_result_satisfies_the_pooled_result_contract(name: str) -> None:
    result = RESULTS[name]()
    assert isinstance(result, PooledResult)
    assert result.k == len(Y)
    assert isinstance(result.ci, tuple) and len(result.ci) == 2
    assert result.prediction is None or (
        isinstance(result.prediction, tuple) and len(result.prediction) == 2
    )
    assert isinstance(result.notes, tuple)
    bayesian = result.method == "bayes"
    assert isinstance(result.predictive, Predictive) if bayesian else result.predictive is None
    doc = json.loads(json.dumps(result.to_dict()))
    assert set(CONTRACT_KEYS) <= set(doc)
    assert (doc["predictive"] is not None) == bayesian
