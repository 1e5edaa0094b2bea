"""Deeply immutable, hashable containers for plain data (JSON-like) held by value objects."""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from typing import Any


class FrozenMap(Mapping[str, Any]):
    """A read-only mapping that keeps its key order and hashes by its items."""

    __slots__ = ("_items", "_lookup")

    def __init__(self, items: Mapping[str, Any] | None = None) -> None:
        pairs = tuple((str(k), freeze(v)) for k, v in (items or {}).items())
        object.__setattr__(self, "_items", pairs)
        object.__setattr__(self, "_lookup", dict(pairs))

    def __getitem__(self, key: str) -> Any:
        return self._lookup[key]

    def __iter__(self) -> Iterator[str]:
        return (k for k, _ in self._items)

    def __len__(self) -> int:
        return len(self._items)

    def __hash__(self) -> int:
        return hash(frozenset(self._items))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, Mapping):
            return dict(self._lookup) == dict(other.items())
        return NotImplemented

    def __setattr__(self, name: str, value: Any) -> None:
        raise AttributeError("a FrozenMap cannot be changed")

    def __repr__(self) -> str:
        return f"FrozenMap({dict(self._items)!r})"


def freeze(value: Any) -> Any:
    """Dicts become FrozenMaps and lists tuples, all the way down."""
    if isinstance(value, FrozenMap):
        return value
    if isinstance(value, Mapping):
        return FrozenMap(value)
    if isinstance(value, list | tuple):
        return tuple(freeze(v) for v in value)
    return value


def thaw(value: Any) -> Any:
    """The plain (JSON-ready) form of a frozen value: dicts and lists again."""
    if isinstance(value, Mapping):
        return {k: thaw(v) for k, v in value.items()}
    if isinstance(value, tuple | list):
        return [thaw(v) for v in value]
    return value
