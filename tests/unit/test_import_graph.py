"""The package's own import graph has no circles and its layers import one way.

Walks the source of every module of ``corrpipe`` with :mod:`ast` (no third-party tool),
counting every import statement wherever it stands: at module level, inside functions, and
under ``if TYPE_CHECKING:`` alike — a local import that dodges a circle at import time is still
a circle in the design (common practice: an acyclic module dependency graph).
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

import corrpipe

PACKAGE_ROOT = Path(corrpipe.__file__).resolve().parent


def _module_name(path: Path) -> str:
    rel = path.relative_to(PACKAGE_ROOT.parent).with_suffix("")
    parts = list(rel.parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _modules() -> dict[str, Path]:
    return {_module_name(p): p for p in sorted(PACKAGE_ROOT.rglob("*.py"))}


def _resolve(name: str, modules: dict[str, Path]) -> str | None:
    """The corrpipe module an imported dotted name belongs to (longest known prefix)."""
    parts = name.split(".")
    while parts:
        candidate = ".".join(parts)
        if candidate in modules:
            return candidate
        parts.pop()
    return None


def import_graph() -> dict[str, set[str]]:
    """Module -> set of corrpipe modules it imports anywhere in its source."""
    modules = _modules()
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for mod, path in modules.items():
        tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
        package = mod if path.name == "__init__.py" else mod.rpartition(".")[0]
        for node in ast.walk(tree):
            targets: list[str] = []
            if isinstance(node, ast.Import):
                targets = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom):
                if node.level:
                    base = package.split(".")
                    base = base[: len(base) - (node.level - 1)]
                    stem = ".".join(base + ([node.module] if node.module else []))
                else:
                    stem = node.module or ""
                # "from pkg import sub" imports the submodule when one exists
                targets = [f"{stem}.{alias.name}" for alias in node.names] + [stem]
            for target in targets:
                if not target.startswith("corrpipe"):
                    continue
                found = _resolve(target, modules)
                if found is not None and found != mod:
                    graph[mod].add(found)
    # a name taken from a package's __init__ that is also a submodule resolves to the
    # submodule; "from corrpipe.x import name" also runs corrpipe.x's __init__, so a package
    # __init__ is an edge whenever any of its members is imported from outside it
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import circle as a list of modules (first repeated at the end), or None."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if state.get(nxt) == 1:
                return stack[stack.index(nxt):] + [nxt]
            if state.get(nxt) is None:
                found = visit(nxt)
                if found:
                    return found
        stack.pop()
        state[node] = 2
        return None

    for node in sorted(graph):
        if state.get(node) is None:
            found = visit(node)
            if found:
                return found
    return None


def _without_package_inits(graph: dict[str, set[str]]) -> dict[str, set[str]]:
    """Drop edges *from* a package ``__init__`` to its own submodules (its re-exports).

    A package's ``__init__`` re-exporting its members is not a design dependency of the
    members on each other; every other edge (including a submodule importing its own
    package's ``__init__``) is kept.
    """
    out = {}
    for mod, deps in graph.items():
        out[mod] = {d for d in deps if not d.startswith(mod + ".")}
    return out


def test_cycle_finder_finds_a_planted_circle():
    # the checker itself must be able to fail (common practice: test the test)
    graph = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}
    assert find_cycle(graph) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b"}, "b": set()}) is None


def test_graph_sees_imports_inside_functions(tmp_path):
    graph = import_graph()
    # corrpipe.cli imports corrpipe.api inside its command functions or at module level
    assert "corrpipe.api" in graph["corrpipe.cli"]


def test_no_import_circles():
    graph = _without_package_inits(import_graph())
    cycle = find_cycle(graph)
    assert cycle is None, "import circle: " + " -> ".join(cycle)


NUMERICAL = ("corrpipe.paircount", "corrpipe.theory", "corrpipe.fit", "corrpipe.mocks",
             "corrpipe.survey", "corrpipe.recon", "corrpipe.estimators", "corrpipe.covariance",
             "corrpipe.cosmo", "corrpipe.mesh", "corrpipe.cosmology", "corrpipe.distributed")
FORBIDDEN = ("corrpipe.stages", "corrpipe.pipeline", "corrpipe.config", "corrpipe.api",
             "corrpipe.cli")


@pytest.mark.parametrize("layer", NUMERICAL)
def test_numerical_modules_import_no_stage_pipeline_config_or_api(layer):
    graph = import_graph()
    bad = sorted(
        f"{mod} -> {dep}"
        for mod, deps in graph.items()
        if mod == layer or mod.startswith(layer + ".")
        for dep in deps
        if any(dep == f or dep.startswith(f + ".") for f in FORBIDDEN)
    )
    assert not bad, "numerical module imports an upper layer: " + "; ".join(bad)
