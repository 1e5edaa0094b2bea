"""Key-by-key comparison of stored values, shared by `verify` (stored against rebuilt) and
`diff` (one version against another), so both name a change the same way."""

from __future__ import annotations

import json
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from registry.values.frozen import thaw


@dataclass(frozen=True)
class Change:
    """One key whose value differs; None stands for a key that is absent."""

    key: str
    before: Any
    after: Any

    def text(self) -> str:
        return f"{self.key} {show(self.before)} -> {show(self.after)}"

    def to_dict(self) -> dict[str, Any]:
        return {"key": self.key, "before": thaw(self.before), "after": thaw(self.after)}


def show(value: Any) -> str:
    """A value as a person reads it: text as it is, numbers in full, the rest as JSON."""
    if value is None:
        return "(absent)"
    if isinstance(value, str):
        return value
    if isinstance(value, float):
        return repr(value)
    return json.dumps(thaw(value), sort_keys=True, ensure_ascii=False)


def changes(before: Mapping[str, Any], after: Mapping[str, Any]) -> list[Change]:
    """The keys of either mapping whose values differ, in sorted order."""
    return [
        Change(key, before.get(key), after.get(key))
        for key in sorted(set(before) | set(after))
        if thaw(before.get(key)) != thaw(after.get(key))
    ]


def by_domain(ratings: Any) -> dict[str, dict[str, Any]]:
    """An entry's ratings (dicts with a `domain`) keyed by domain."""
    return {r["domain"]: dict(r) for r in thaw(ratings)}


def rating_changes(before: Any, after: Any) -> list[Change]:
    """Per domain, what of the rating (level, rule, reason) changed."""
    old, new = by_domain(before), by_domain(after)
    return [
        Change(f"rating {domain} {c.key}", c.before, c.after)
        for domain in sorted(set(old) | set(new))
        for c in changes(old.get(domain, {}), new.get(domain, {}))
        if c.key != "domain"
    ]
