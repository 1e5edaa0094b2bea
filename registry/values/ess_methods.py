"""The effective-sample-size methods: our key for each, what it measures, its published source.

Keys name what each method measures; the published method keeps its name and source here, in
`registry.priors.ess` and in the README. Stdlib only, so that listings can name them quickly.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class EssMethod:
    key: str
    published_as: str
    source: str


TABLE = (
    EssMethod(
        "expected_information",
        "expected local information ratio",
        "Neuenschwander, Weber, Schmidli & O'Hagan (2020), Biometrics 76:578",
    ),
    EssMethod(
        "curvature_at_mean",
        "ESS of Morita, Thall & Müller",
        "Morita, Thall & Müller (2008), Biometrics 64:595",
    ),
    EssMethod(
        "variance_match",
        "moment matching to the conjugate form",
        "common practice",
    ),
)
ESS_METHODS: tuple[str, ...] = tuple(m.key for m in TABLE)
