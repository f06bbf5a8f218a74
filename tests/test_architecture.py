"""The import graph: no cycles, and no reaching into another package's private names.

Read with ``ast`` from the source files, so imports inside functions count as
edges too (a cycle hidden by a function-level import is still a cycle).

Rules (STYLE.md, "A small public surface"):

- a module imports a ``_``-prefixed module or name only from its own package;
- no cycle among the modules of ``creditsurv``;
- tests and benchmarks use public names only.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "creditsurv"


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts = parts[:-1]
    return ".".join(parts)


def _is_package(path: Path) -> bool:
    return path.name == "__init__.py"


MODULES = {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _package_of(module: str) -> str:
    """The package a module belongs to: itself for a package ``__init__``, else its parent."""
    return module if _is_package(MODULES[module]) else module.rsplit(".", 1)[0]


def _resolve(module: str, node: ast.ImportFrom) -> str:
    if node.level == 0:
        return node.module or ""
    base = _package_of(module).split(".")
    base = base[: len(base) - (node.level - 1)]
    return ".".join(base + ([node.module] if node.module else []))


def _imports(module: str, path: Path):
    """``(imported module, imported name or None, line)`` for every import in ``path``."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield alias.name, None, node.lineno
        elif isinstance(node, ast.ImportFrom):
            target = _resolve(module, node)
            for alias in node.names:
                if f"{target}.{alias.name}" in MODULES:  # ``from . import x`` names a module
                    yield f"{target}.{alias.name}", None, node.lineno
                else:
                    yield target, alias.name, node.lineno


def _is_private(dotted: str) -> bool:
    return any(part.startswith("_") and not part.startswith("__") for part in dotted.split("."))


def _private_reaches(importer: str, importer_package: str, path: Path) -> list[str]:
    found = []
    for target, name, line in _imports(importer, path):
        if not target.startswith("creditsurv"):
            continue
        owner = _package_of(target) if target in MODULES else target.rsplit(".", 1)[0]
        private_module = _is_private(target.removeprefix(owner).lstrip(".")) or _is_private(owner)
        private_name = name is not None and name.startswith("_") and not name.startswith("__")
        if (private_module or private_name) and owner != importer_package:
            shown = f"{target}.{name}" if name else target
            found.append(f"{path.relative_to(ROOT)}:{line}: {shown}")
    return found


def test_no_module_reaches_into_another_packages_private_names():
    found = []
    for module, path in MODULES.items():
        found += _private_reaches(module, _package_of(module), path)
    assert not found, "private names used outside their package:\n" + "\n".join(found)


def _edges() -> dict[str, set[str]]:
    graph: dict[str, set[str]] = {m: set() for m in MODULES}
    for module, path in MODULES.items():
        for target, _name, _line in _imports(module, path):
            if target in MODULES and target != module:
                # Importing a package's submodule loads the package itself first; that
                # edge is Python's, not the code's, so only the named module counts.
                graph[module].add(target)
    return graph


def _cycles(graph: dict[str, set[str]]) -> list[list[str]]:
    """Strongly connected components with more than one module (Tarjan)."""
    index, low, stack, on_stack, out = {}, {}, [], set(), []
    counter = [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                out.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            visit(v)
    return out


def test_the_import_graph_has_no_cycles():
    cycles = _cycles(_edges())
    assert not cycles, "import cycles:\n" + "\n".join(" <-> ".join(c) for c in cycles)


def test_the_cycle_finder_finds_a_cycle():
    # The check above can fail: a hand-made graph with one cycle is reported.
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}}) == [["a", "b", "c"]]


@pytest.mark.parametrize("folder", ["tests", "benchmarks"])
def test_tests_and_benchmarks_use_public_names_only(folder):
    found = []
    for path in sorted((ROOT / folder).glob("*.py")):
        found += _private_reaches(f"{folder}.{path.stem}", folder, path)
    assert not found, "private names used:\n" + "\n".join(found)


def test_every_package_declares_its_public_names():
    for module, path in MODULES.items():
        if _is_package(path) and module != "creditsurv":
            tree = ast.parse(path.read_text(encoding="utf-8"))
            names = [t.id for n in tree.body if isinstance(n, ast.Assign) for t in n.targets if isinstance(t, ast.Name)]
            assert "__all__" in names, f"{module} has no __all__"
