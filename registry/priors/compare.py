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


def _rating(rating: Mapping[str, Any] | None) -> str | None:
    if rating is None:
        return None
    why = f": {rating['rationale']}" if rating.get("rationale") else ""
    return f"{rating['level']} ({rating['rule']}{why})"


def rating_changes(before: Any, after: Any) -> list[Change]:
    """One change per domain whose rating (level, rule or reason) differs, each side as
    'level (rule: reason)'."""
    old = {r["domain"]: dict(r) for r in thaw(before)}
    new = {r["domain"]: dict(r) for r in thaw(after)}
    return [
        Change(f"rating {domain}", _rating(old.get(domain)), _rating(new.get(domain)))
        for domain in sorted(set(old) | set(new))
        if old.get(domain) != new.get(domain)
    ]
