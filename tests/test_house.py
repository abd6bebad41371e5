"""The package's shape: no import cycles, a public API that matches ``__all__``."""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

import debtsim

PACKAGE = Path(debtsim.__file__).resolve().parent


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def import_graph() -> dict[str, set[str]]:
    """Edges module -> debtsim module it imports, lazy and TYPE_CHECKING imports included.

    A package's imports of its own sub-modules are not edges (re-exports).
    """
    files = {_module_name(f): f for f in PACKAGE.rglob("*.py")}
    graph: dict[str, set[str]] = {m: set() for m in files}
    for name, path in files.items():
        is_package = path.name == "__init__.py"
        base = name.split(".") if is_package else name.split(".")[:-1]
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            targets: list[str] = []
            if isinstance(node, ast.Import):
                targets = [a.name for a in node.names]
            elif isinstance(node, ast.ImportFrom):
                if node.level:
                    stem = base[: len(base) - node.level + 1]
                    source = ".".join(stem + ([node.module] if node.module else []))
                else:
                    source = node.module or ""
                targets = [
                    f"{source}.{a.name}" if f"{source}.{a.name}" in files else source
                    for a in node.names
                ]
            for target in targets:
                while target and target not in files:
                    target = target.rpartition(".")[0]
                if not target or target == name:
                    continue
                if is_package and target.startswith(name + "."):
                    continue
                graph[name].add(target)
    return graph


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle as a list of modules, or None (depth-first search)."""
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(m: str) -> list[str] | None:
        state[m] = 1
        stack.append(m)
        for n in sorted(graph[m]):
            if state.get(n) == 1:
                return stack[stack.index(n):] + [n]
            if n not in state:
                found = visit(n)
                if found:
                    return found
        stack.pop()
        state[m] = 2
        return None

    for m in sorted(graph):
        if m not in state:
            found = visit(m)
            if found:
                return found
    return None


def test_finder_sees_a_planted_cycle() -> None:
    """The cycle finder itself works: a two-module loop is found, a chain is not."""
    assert find_cycle({"a": {"b"}, "b": {"a"}}) == ["a", "b", "a"]
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": set()}) is None


def test_no_import_cycles_in_the_package() -> None:
    """No module of debtsim/ reaches itself through imports (the house flows one way)."""
    graph = import_graph()
    assert "debtsim.runner" in graph and graph["debtsim.runner"]  # the walk saw real edges
    assert find_cycle(graph) is None, " -> ".join(find_cycle(graph) or [])


def test_report_is_not_imported_by_what_it_renders() -> None:
    """Studies, runner, engines and model never import the report layer."""
    graph = import_graph()
    for module, targets in graph.items():
        if module.startswith(("debtsim.studies", "debtsim.engines", "debtsim.model",
                              "debtsim.book", "debtsim.risk")):
            assert not any(t.startswith("debtsim.report") for t in targets), module


def test_public_names_match_all() -> None:
    """Every name in debtsim.__all__ resolves, and __all__ lists exactly the exports."""
    exports = debtsim._EXPORTS
    assert sorted(debtsim.__all__) == sorted(["__version__", *exports])
    for name in debtsim.__all__:
        assert getattr(debtsim, name) is not None
        if name in exports:
            assert getattr(importlib.import_module(exports[name]), name) is getattr(debtsim, name)


def test_cli_uses_only_the_public_api() -> None:
    """cli.py imports debtsim's public names, not its modules below the front door."""
    tree = ast.parse((PACKAGE / "cli.py").read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.module.startswith("debtsim"):
            assert node.module == "debtsim", node.module
        if isinstance(node, ast.Import):
            assert all(not a.name.startswith("debtsim.") for a in node.names)
