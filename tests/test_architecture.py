"""The package's shape: imports point one way (no cycle among seqpipe modules), functions stay
short, and no module reaches into another module's private names."""

from __future__ import annotations

import ast
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

PACKAGE = Path(__file__).resolve().parent.parent / "seqpipe"
REPO = PACKAGE.parent
MAX_FUNCTION_LINES = 80


@dataclass(frozen=True, slots=True)
class Module:
    """One parsed seqpipe module."""

    name: str  # dotted, e.g. seqpipe.sources.text (a package's __init__: the package)
    is_package: bool
    tree: ast.Module

    @classmethod
    def parse(cls, name: str, source: str, *, is_package: bool = False) -> Module:
        return cls(name, is_package, ast.parse(source, name))


def package_modules() -> dict[str, Module]:
    """Every module of the package by dotted name."""
    out = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        parts = path.relative_to(PACKAGE.parent).with_suffix("").parts
        is_package = parts[-1] == "__init__"
        name = ".".join(parts[:-1] if is_package else parts)
        out[name] = Module.parse(name, path.read_text(encoding="utf-8"), is_package=is_package)
    return out


def absolute(module: Module, level: int, target: str | None) -> str:
    """The dotted name a (possibly relative) ``from`` import refers to."""
    if level == 0:
        return target or ""
    base = module.name.split(".")
    base = base if module.is_package else base[:-1]
    base = base[: len(base) - (level - 1)]
    return ".".join([*base, target] if target else base)


def type_checking_only(module: Module) -> set[int]:
    """Ids of the import nodes under ``if TYPE_CHECKING:``: they never run, so they are no
    dependency at import time (the package ``__init__`` names its lazy exports that way)."""
    out: set[int] = set()
    for node in ast.walk(module.tree):
        if isinstance(node, ast.If) and (dotted_name(node.test) or "").endswith("TYPE_CHECKING"):
            out.update(id(inner) for stmt in node.body for inner in ast.walk(stmt))
    return out


def imports(module: Module, known: set[str]) -> Iterator[tuple[int, str, str | None, str, str]]:
    """``(line, module, name, local, refers)`` for every import in ``module`` at any depth (imports
    inside functions too, not those under ``if TYPE_CHECKING:``): ``name`` is the attribute a
    ``from`` import takes (None when it names a submodule in ``known`` or for a plain
    ``import``), ``local`` the name it binds and ``refers`` the module that name is bound to."""
    skip = type_checking_only(module)
    for node in ast.walk(module.tree):
        if id(node) in skip:
            continue
        if isinstance(node, ast.Import):
            for alias in node.names:
                local = alias.asname or alias.name.split(".")[0]
                yield node.lineno, alias.name, None, local, alias.name if alias.asname else local
        elif isinstance(node, ast.ImportFrom):
            source = absolute(module, node.level, node.module)
            for alias in node.names:
                sub = f"{source}.{alias.name}"
                local = alias.asname or alias.name
                if sub in known:
                    yield node.lineno, sub, None, local, sub
                else:
                    yield node.lineno, source, alias.name, local, f"{source}.{alias.name}"


def import_graph(modules: dict[str, Module]) -> dict[str, set[str]]:
    """seqpipe module -> the seqpipe modules it imports (a package counts as its ``__init__``)."""
    known = set(modules)
    return {
        name: {target for _, target, *_ in imports(module, known) if target in known and target != name}
        for name, module in modules.items()
    }


def find_cycle(graph: dict[str, set[str]]) -> list[str] | None:
    """One cycle of ``graph`` as a closed path ``[a, b, ..., a]``, or None (iterative DFS)."""
    state: dict[str, int] = {}  # 1: on the current path, 2: finished
    for root in sorted(graph):
        if root in state:
            continue
        path = [root]
        todo = [iter(sorted(graph[root]))]
        state[root] = 1
        while todo:
            nxt = next(todo[-1], None)
            if nxt is None:
                state[path.pop()] = 2
                todo.pop()
            elif state.get(nxt) == 1:
                return [*path[path.index(nxt) :], nxt]
            elif nxt not in state:
                state[nxt] = 1
                path.append(nxt)
                todo.append(iter(sorted(graph.get(nxt, ()))))
    return None


def test_cycle_finder_reports_a_loop_and_accepts_a_tree() -> None:
    """The cycle finder returns a closed path for a three-module loop and None for a tree."""
    assert find_cycle({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == ["a", "b", "c", "a"]
    assert find_cycle({"a": {"b", "c"}, "b": {"c"}, "c": set()}) is None


def test_import_graph_counts_function_level_and_relative_imports() -> None:
    """An import inside a function and a relative ``from . import x`` are both edges."""
    modules = {
        "seqpipe.a": Module.parse("seqpipe.a", "def f():\n    from seqpipe import b\n"),
        "seqpipe.b": Module.parse("seqpipe.b", "from . import a\n"),
    }
    assert import_graph(modules) == {"seqpipe.a": {"seqpipe.b"}, "seqpipe.b": {"seqpipe.a"}}


def test_no_import_cycle_among_seqpipe_modules() -> None:
    """No seqpipe module imports itself back through a chain of seqpipe imports, counting
    imports inside functions (they defer the cost, not the dependency)."""
    cycle = find_cycle(import_graph(package_modules()))
    assert cycle is None, "import cycle: " + " -> ".join(cycle or [])


def long_functions(module: Module) -> Iterator[str]:
    """``module:line name (N lines)`` for every function longer than the limit, counted from
    its first decorator to its last line."""
    for node in ast.walk(module.tree):
        if isinstance(node, ast.FunctionDef | ast.AsyncFunctionDef):
            first = min([node.lineno, *(d.lineno for d in node.decorator_list)])
            lines = (node.end_lineno or node.lineno) - first + 1
            if lines > MAX_FUNCTION_LINES:
                yield f"{module.name}:{node.lineno} {node.name} ({lines} lines)"


def test_length_check_flags_one_line_over() -> None:
    """A function one line over the limit (decorator included) is reported, one at it is not."""
    body = "\n".join(f"    x{i} = {i}" for i in range(MAX_FUNCTION_LINES - 2))
    source = f"@staticmethod\ndef over():\n    y = 0\n{body}\n\n@staticmethod\ndef at():\n{body}\n"
    found = list(long_functions(Module.parse("seqpipe.probe", source)))
    assert found == [f"seqpipe.probe:2 over ({MAX_FUNCTION_LINES + 1} lines)"]


def test_no_function_over_the_length_limit() -> None:
    """No function in seqpipe/ is longer than 80 lines (a long procedure is cut into named steps)."""
    found = [entry for module in package_modules().values() for entry in long_functions(module)]
    assert found == []


def is_private(name: str) -> bool:
    return name.startswith("_") and not name.startswith("__")


def dotted_name(node: ast.expr) -> str | None:
    """``a.b.c`` for a chain of attribute lookups on a name, else None."""
    if isinstance(node, ast.Name):
        return node.id
    if isinstance(node, ast.Attribute):
        inner = dotted_name(node.value)
        return None if inner is None else f"{inner}.{node.attr}"
    return None


def private_reaches(module: Module, known: set[str]) -> Iterator[str]:
    """Every place ``module`` uses a private name of another seqpipe module: ``from seqpipe.x
    import _y``, and ``x._y`` where ``x`` is a seqpipe module. Importing a private module itself
    (``from seqpipe._hashing import hash_file``, ``from seqpipe import _parse``) is fine."""
    bound: dict[str, str] = {}  # local name -> the seqpipe module it refers to
    for line, target, name, local, refers in imports(module, known):
        bound[local] = refers
        if name is not None and target in known and target != module.name and is_private(name):
            yield f"{module.name}:{line} imports {target}.{name}"
    for node in ast.walk(module.tree):
        if isinstance(node, ast.Attribute) and is_private(node.attr):
            dotted = dotted_name(node.value)
            if dotted is None:
                continue
            head, _, rest = dotted.partition(".")
            target = bound.get(head, head) + (f".{rest}" if rest else "")
            if target in known and target != module.name:
                yield f"{module.name}:{node.lineno} uses {target}.{node.attr}"


def test_private_reach_check_flags_both_forms() -> None:
    """The private-name check catches ``from seqpipe.x import _y`` and ``seqpipe.x._y`` (also
    through an alias) and lets a public name of a private module through."""
    known = {"seqpipe", "seqpipe.recipe", "seqpipe._hashing", "seqpipe.probe"}
    source = (
        "import seqpipe.recipe\n"
        "from seqpipe.recipe import _secret\n"
        "from seqpipe._hashing import hash_file\n"
        "from seqpipe import recipe as r\n"
        "x = seqpipe.recipe._other\n"
        "y = r._third\n"
        "z = hash_file._not_a_module\n"
    )
    found = list(private_reaches(Module.parse("seqpipe.probe", source), known))
    assert found == [
        "seqpipe.probe:2 imports seqpipe.recipe._secret",
        "seqpipe.probe:5 uses seqpipe.recipe._other",
        "seqpipe.probe:6 uses seqpipe.recipe._third",
    ]


def test_no_module_uses_another_modules_private_names() -> None:
    """Outside ``seqpipe/__init__.py``, no seqpipe module imports or reads a private (underscore)
    name of another seqpipe module; a helper two modules share is public in its (private) module."""
    modules = package_modules()
    known = set(modules)
    found = [entry for name, module in modules.items() if name != "seqpipe" for entry in private_reaches(module, known)]
    assert found == []


def _developers_map() -> list[str]:
    """Names in the first column of DEVELOPERS.md's architecture block (indented lines continue the one above)."""
    text = (REPO / "DEVELOPERS.md").read_text(encoding="utf-8")
    block = text.split("## Architecture", 1)[1].split("```", 2)[1]
    return [line.split()[0] for line in block.splitlines() if line.strip() and not line[0].isspace()]


def test_developers_map_names_every_module_and_nothing_else() -> None:
    """DEVELOPERS.md's package map has one line per module or subpackage of seqpipe/, and each
    line names one that exists (so the map cannot drift from the code)."""
    package = REPO / "seqpipe"
    actual = {p.name for p in package.glob("*.py")} | {
        f"{p.name}/" for p in package.iterdir() if p.is_dir() and p.name != "__pycache__"
    }
    listed = _developers_map()
    assert len(listed) == len(set(listed)), "a module is listed twice"
    assert set(listed) == actual, (sorted(actual - set(listed)), sorted(set(listed) - actual))
