"""The package's modules import one another without a cycle (lazy imports inside functions included)."""

from __future__ import annotations

import ast
from pathlib import Path

from conftest import REPO

PACKAGE = REPO / "seqpipe"


def _module_name(path: Path) -> str:
    parts = path.relative_to(REPO).with_suffix("").parts
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def _imports(path: Path, name: str, modules: set[str]) -> set[str]:
    """The seqpipe modules ``path`` imports anywhere in its body; ``from pkg import sub`` counts
    as an import of the submodule ``pkg.sub`` only, as Python resolves it."""
    found: set[str] = set()
    package = name if path.name == "__init__.py" else name.rpartition(".")[0]
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")[: len(package.split(".")) - node.level + 1]
                base = ".".join([*anchor, base] if base else anchor)
            subs = {f"{base}.{a.name}" for a in node.names} & modules
            found.update(subs if len(subs) == len(node.names) else {base, *subs})
    return (found & modules) - {name, "seqpipe"}


def import_graph() -> dict[str, set[str]]:
    paths = {_module_name(p): p for p in PACKAGE.rglob("*.py")}
    modules = set(paths)
    return {name: _imports(p, name, modules) for name, p in paths.items()}


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One import cycle (its modules in order, the first repeated at the end), or None."""
    state: dict[str, int] = {}  # 1: on the current path, 2: done
    path: list[str] = []

    def visit(node: str) -> list[str] | None:
        state[node] = 1
        path.append(node)
        for dep in sorted(graph[node]):
            if state.get(dep) == 1:
                return [*path[path.index(dep) :], dep]
            if dep not in state and (cycle := visit(dep)):
                return cycle
        path.pop()
        state[node] = 2
        return None

    for node in sorted(graph):
        if node not in state and (cycle := visit(node)):
            return cycle
    return None


def test_the_cycle_finder_finds_a_cycle() -> None:
    """find_cycle reports a two-module cycle and accepts a chain."""
    assert find_cycle({"a": {"b"}, "b": {"a"}}) == ["a", "b", "a"]
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": set()}) is None


def test_no_import_cycle_among_seqpipe_modules() -> None:
    """No seqpipe module imports, directly or through others, a module that imports it back."""
    graph = import_graph()
    assert {"seqpipe.storage", "seqpipe._verify", "seqpipe.transfer"} <= set(graph)
    assert find_cycle(graph) is None, find_cycle(graph)


def test_storage_sits_below_verify_and_transfer() -> None:
    """storage imports neither verify nor transfer; verify does not import transfer."""
    graph = import_graph()
    assert not graph["seqpipe.storage"] & {"seqpipe._verify", "seqpipe.transfer"}
    assert "seqpipe.transfer" not in graph["seqpipe._verify"]
    assert {"seqpipe._verify", "seqpipe.storage"} <= graph["seqpipe.transfer"]
