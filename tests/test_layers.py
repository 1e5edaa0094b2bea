"""The package's layers: no module imports a higher layer, and no modules import each other in a
cycle. Every import counts, including those inside functions (deferred for start-up speed).
The table is the one in DEVELOPERS.md."""

from __future__ import annotations

import ast
import itertools
from functools import cache
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parent.parent / "registry"

# layer -> the layers it may import (besides itself)
_ABOVE_PRIORS = {"base", "values", "evidence", "synthesis", "storage", "priors"}
ALLOWED: dict[str, set[str]] = {
    "base": set(),
    "values": {"base"},
    "evidence": {"base", "values"},
    "synthesis": {"base", "values"},
    "storage": {"base", "values", "evidence"},
    "emit": {"base", "values"},
    "priors": {"base", "values", "evidence", "synthesis", "storage"},
    "checks": _ABOVE_PRIORS,
    "report": _ABOVE_PRIORS | {"checks", "emit"},
    "demo": _ABOVE_PRIORS | {"checks", "emit", "report"},
    "cli": _ABOVE_PRIORS | {"checks", "emit", "report", "demo"},
    "migrations": {"base", "storage"},
    "seed_entries": set(),
}


def layer_of(module: str) -> str:
    parts = module.split(".")
    if len(parts) == 1 or parts[1] in ("errors", "caution"):
        return "base"
    return parts[1]


@cache
def modules() -> dict[str, Path]:
    found = {}
    for path in PACKAGE.rglob("*.py"):
        relative = path.relative_to(PACKAGE.parent).with_suffix("")
        parts = list(relative.parts)
        if parts[-1] == "__init__":
            parts.pop()
        found[".".join(parts)] = path
    return found


def imports(path: Path) -> set[str]:
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out |= {a.name for a in node.names if a.name.startswith("registry")}
        elif isinstance(node, ast.ImportFrom) and (node.module or "").startswith("registry"):
            out.add(node.module)
            # `from registry.emit import stan` imports the module registry.emit.stan
            out |= {f"{node.module}.{a.name}" for a in node.names}
    return out


@cache
def graph() -> dict[str, set[str]]:
    known = modules()
    return {name: {m for m in imports(path) if m in known} - {name} for name, path in known.items()}


def test_every_module_has_a_layer() -> None:
    assert {layer_of(m) for m in modules()} <= set(ALLOWED)


@pytest.mark.parametrize("module", sorted(modules()))
def test_no_module_imports_a_higher_layer(module: str) -> None:
    mine = layer_of(module)
    wrong = sorted(
        m for m in graph()[module] if layer_of(m) != mine and layer_of(m) not in ALLOWED[mine]
    )
    assert not wrong, f"{module} ({mine}) imports {wrong}"


def test_no_import_cycles() -> None:
    edges = graph()
    state: dict[str, int] = {}
    cycles = []

    def visit(node: str, path: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(edges[node]):
            if state.get(nxt) == 1:
                cycles.append([*path[path.index(nxt) :], nxt] if nxt in path else [node, nxt])
            elif nxt not in state:
                visit(nxt, [*path, nxt])
        state[node] = 2

    for start in sorted(edges):
        if start not in state:
            visit(start, [start])
    # a package's __init__ that re-exports its own submodules is not a cycle of ours
    real = [c for c in cycles if not any(b.startswith(a + ".") for a, b in itertools.pairwise(c))]
    assert not real, f"import cycles: {real}"
