"""What a build computes and the registry stores: a typed, versioned value.

`BuildResult.to_dict()` is the stored form; `from_dict` reads it back, including results
stored by older versions of priorledger (format 1, before this value had a format number).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from registry.values.frozen import FrozenMap, freeze, thaw
from registry.values.prior import Component

FORMAT_VERSION = 2

# Format 1 named the effective-sample-size methods after their authors; format 2 names them by
# what each measures (the published method stays in the docstrings and the README).
_OLD_ESS_KEYS = {
    "elir": "expected_information",
    "morita": "curvature_at_mean",
    "moment": "variance_match",
}


@dataclass(frozen=True)
class BuildResult:
    """The prior's components and everything the build computed on the way.

    `ess` holds each method's value (None where it does not exist, with the reason in its
    `notes`), `warnings` what the user must see (a fit that misses its bound), `pooled` the
    pooled result, `fit` how the output family was fitted and its
    error, `robust` the vague component's description and information, `plausible` the
    prior's mass in the definition's plausible range.
    """

    scale: str
    measure: str
    components: tuple[Component, ...]
    ess: Mapping[str, Any]
    pooled: Mapping[str, Any]
    fit: Mapping[str, Any]
    global_power: float
    target: str
    notes: tuple[str, ...] = ()
    warnings: tuple[str, ...] = ()
    plausible: Mapping[str, Any] | None = None
    robust: Mapping[str, Any] | None = None
    include_retracted: bool = False
    format_version: int = field(default=FORMAT_VERSION)

    def __post_init__(self) -> None:
        object.__setattr__(self, "components", tuple(self.components))
        object.__setattr__(self, "notes", tuple(self.notes))
        object.__setattr__(self, "warnings", tuple(self.warnings))
        for name in ("ess", "pooled", "fit", "plausible", "robust"):
            value = getattr(self, name)
            object.__setattr__(self, name, None if value is None else freeze(value))

    def to_dict(self) -> dict[str, Any]:
        return {
            "format_version": self.format_version,
            "scale": self.scale,
            "measure": self.measure,
            "components": [c.to_dict() for c in self.components],
            "ess": thaw(self.ess),
            "pooled": thaw(self.pooled),
            "fit": thaw(self.fit),
            "global_power": self.global_power,
            "target": self.target,
            "notes": list(self.notes),
            "warnings": list(self.warnings),
            "plausible": thaw(self.plausible),
            "robust": thaw(self.robust),
            "include_retracted": self.include_retracted,
        }

    @classmethod
    def from_dict(cls, doc: Mapping[str, Any]) -> BuildResult:
        version = int(doc.get("format_version", 1))
        ess = dict(doc["ess"])
        if version == 1:
            ess = {_OLD_ESS_KEYS.get(k, k): v for k, v in ess.items()}
            ess["method"] = _OLD_ESS_KEYS.get(ess.get("method"), ess.get("method"))
            ess["notes"] = {_OLD_ESS_KEYS.get(k, k): v for k, v in ess.get("notes", {}).items()}
        return cls(
            scale=doc["scale"],
            measure=doc["measure"],
            components=tuple(Component.from_dict(c) for c in doc["components"]),
            ess=ess,
            pooled=doc["pooled"],
            fit=doc["fit"],
            global_power=float(doc["global_power"]),
            target=doc["target"],
            notes=tuple(doc.get("notes", ())),
            warnings=tuple(doc.get("warnings", ())),
            plausible=doc.get("plausible"),
            robust=doc.get("robust"),
            include_retracted=bool(doc.get("include_retracted", False)),
            format_version=FORMAT_VERSION,
        )


__all__ = ["FORMAT_VERSION", "BuildResult", "FrozenMap"]
