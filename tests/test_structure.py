"""The package's layering contract (DEVELOPERS.md, "Module map"): imports run downwards only.

Common practice, no source: a layered package whose modules import only from their own layer or
the layers below has no import circles and can be read bottom-up. These checks parse the source
with :mod:`ast` (nothing is imported) and fail on an upward import, a circle, a loader by name,
or a module over 800 lines.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

PACKAGE = Path(__file__).resolve().parents[1] / "tbminv"

#: layer of each top-level module or sub-package (low to high), as in DEVELOPERS.md
LAYERS = {
    "gimli": 0, "cache": 0, "tomlfile": 0, "__init__": 0,
    "layout": 1, "ground": 1, "materials": 1,
    "readings": 2, "forward": 2,
    "inversion": 3,
    "results": 4,
    "studies": 5,
    "plots": 6,
    "report": 7, "widgets": 7,
    "jobs": 8,
    "demo": 9,
    "cli": 10, "__main__": 11,
}
MAX_LINES = 800


def _modules() -> dict[str, Path]:
    out = {}
    for path in PACKAGE.rglob("*.py"):
        rel = path.relative_to(PACKAGE.parent).with_suffix("")
        name = ".".join(rel.parts)
        out[name.removesuffix(".__init__")] = path
    return out


def _layer(module: str) -> int:
    parts = module.split(".")
    top = parts[1] if len(parts) > 1 else "__init__"
    return LAYERS[top]


def _imports(path: Path) -> list[tuple[str, int]]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found = []
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            if node.module == "tbminv":
                found += [(f"tbminv.{a.name}", node.lineno) for a in node.names
                          if a.name not in ("__version__", "CAUTION", "environment_report")]
            elif node.module.startswith("tbminv."):
                found.append((node.module, node.lineno))
        elif isinstance(node, ast.Import):
            found += [(a.name, node.lineno) for a in node.names if a.name.startswith("tbminv.")]
    return found


MODULES = _modules()


def test_every_module_has_a_layer():
    unknown = sorted({m.split(".")[1] for m in MODULES if "." in m} - set(LAYERS))
    assert not unknown, f"modules without a layer in LAYERS: {unknown}"


@pytest.mark.parametrize("module", sorted(MODULES))
def test_imports_run_downwards(module):
    mine = _layer(module)
    upward = [(target, line) for target, line in _imports(MODULES[module])
              if target in MODULES and _layer(target) > mine]
    assert not upward, f"{module} imports from a higher layer: {upward}"


def test_no_import_circle():
    graph = {m: {t for t, _ in _imports(p) if t in MODULES and t != m} for m, p in MODULES.items()}
    # a package's __init__ that gathers its submodules is not a circle through them
    for m in graph:
        graph[m] = {t for t in graph[m] if not m.startswith(t + ".")}
    state: dict[str, int] = {}
    stack: list[str] = []

    def visit(m: str) -> None:
        state[m] = 1
        stack.append(m)
        for t in graph[m]:
            if state.get(t) == 1:
                raise AssertionError("import circle: " + " -> ".join(stack[stack.index(t):] + [t]))
            if t not in state:
                visit(t)
        stack.pop()
        state[m] = 2

    for m in sorted(graph):
        if m not in state:
            visit(m)


@pytest.mark.parametrize("module", sorted(MODULES))
def test_no_loader_by_name_and_no_giant_module(module):
    text = MODULES[module].read_text(encoding="utf-8")
    assert "import_module(" not in text and "__import__(" not in text, module
    n = text.count("\n")
    assert n <= MAX_LINES, f"{module}: {n} lines (split it by concept)"
