"""The package's architecture, checked from its source: three layers, imports only downwards, no cycles.

Layers (DEVELOPERS.md): core (0) < tools (1) < skins (2); the package's `__init__` and
`__main__` are the public facade and may import any layer. The core must not import
pytest or argparse. Imports inside functions count too: a lazy import is still a dependency.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "trainguard"
LAYERS = {"core": 0, "tools": 1, "skins": 2}


def _module_name(path: Path) -> str:
    parts = list(path.relative_to(PACKAGE.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path: Path) -> set[str]:
    """Absolute names of the trainguard modules (and third-party top-level packages) `path` imports."""
    name = _module_name(path)
    package = name if path.name == "__init__.py" else name.rsplit(".", 1)[0]
    found: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - node.level + 1]
                target = ".".join(base + ([node.module] if node.module else []))
            else:
                target = node.module or ""
            found.add(target)
            for alias in node.names:  # `from . import store` imports the module trainguard.core.store
                found.add(f"{target}.{alias.name}")
    return found


MODULES = {_module_name(p): p for p in sorted(PACKAGE.rglob("*.py"))}


def _layer(module: str) -> int | None:
    parts = module.split(".")
    return LAYERS.get(parts[1]) if len(parts) > 1 else None


def _graph() -> dict[str, set[str]]:
    return {m: {i for i in _imports(p) if i in MODULES and i != m} for m, p in MODULES.items()}


def test_every_module_belongs_to_a_layer_or_the_facade():
    loose = [m for m in MODULES if _layer(m) is None and m not in ("trainguard", "trainguard.__main__")]
    assert loose == []


@pytest.mark.parametrize("module", sorted(MODULES))
def test_imports_go_only_to_the_same_or_a_lower_layer(module):
    own = _layer(module)
    if own is None:
        return  # the facade
    upward = sorted(i for i in _graph()[module] if (_layer(i) is None and i != "trainguard.core.version")
                    or (_layer(i) or 0) > own)
    assert upward == [], f"{module} imports from a higher layer: {upward}"


@pytest.mark.parametrize("module", sorted(m for m in MODULES if _layer(m) == 0))
def test_the_core_knows_nothing_of_pytest_or_argparse(module):
    third = {i.split(".")[0] for i in _imports(MODULES[module])}
    assert not third & {"pytest", "_pytest", "argparse", "pluggy"}, module


def test_no_import_cycles():
    graph = _graph()
    # the package itself is the facade: it imports everything lazily, nothing may import it
    assert sorted(m for m, deps in graph.items() if "trainguard" in deps) == []
    cycles, state = [], {}

    def visit(node, stack):
        state[node] = "open"
        stack.append(node)
        for dep in sorted(graph[node]):
            if state.get(dep) == "open":
                cycles.append(stack[stack.index(dep):] + [dep])
            elif dep not in state:
                visit(dep, stack)
        stack.pop()
        state[node] = "done"

    for module in sorted(graph):
        if module not in state:
            visit(module, [])
    assert cycles == []


def test_the_checker_itself_sees_a_violation(tmp_path):
    """A module of the core importing a skin, or pytest, is found (so the tests above can fail)."""
    bad = tmp_path / "trainguard" / "core" / "bad.py"
    bad.parent.mkdir(parents=True)
    bad.write_text("import pytest\nfrom ..skins.cli import main\nfrom . import store\n")
    global PACKAGE
    saved, PACKAGE = PACKAGE, tmp_path / "trainguard"
    try:
        found = _imports(bad)
    finally:
        PACKAGE = saved
    assert {"pytest", "trainguard.skins.cli", "trainguard.core.store"} <= found
